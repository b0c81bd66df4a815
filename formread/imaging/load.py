"""Scans in: PNG, JPEG, TIFF (multi-page, any common mode incl. CCITT Group 4) and PDF, as grey pages.

Every page becomes a ``Page`` whose ``gray`` is ``(H, W) uint8`` with 0 = ink and 255 = paper.
What goes wrong becomes one line: ``ImageError("<file>[ page N]: <problem>")``.

Resolution: taken from the file (TIFF/PNG/JPEG header); ``dpi=`` overrides it; a file that states
none (or an implausible one, outside 50..4800) is taken as ``FALLBACK_DPI`` = 300, the usual
scanning resolution for records (common practice). Pixels that are not square (fax-style 204 x 98)
are resampled to square pixels at the horizontal resolution. PDF pages are rendered with pypdfium2
at ``pdf_dpi`` (or ``dpi`` when given).

Size guard: Pillow's decompression-bomb guard stays on, and any page above ``MAX_PAGE_PIXELS``
(80 million pixels: more than an A3 page at 600 dpi) is refused before it is decoded.
"""

from __future__ import annotations

import logging
import re
import struct
import warnings
import zlib
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from PIL import Image, ImageOps

from ..errors import ImageError, check_param, one_line

__all__ = ["Page", "load_pages", "iter_pages", "FALLBACK_DPI", "MAX_PAGE_PIXELS", "IMAGE_FORMATS"]

log = logging.getLogger(__name__)

FALLBACK_DPI = 300.0
MAX_PAGE_PIXELS = 80_000_000
IMAGE_FORMATS = ("PNG", "JPEG", "TIFF", "BMP")
_DPI_RANGE = (50.0, 4800.0)
# What Pillow raises on damaged or truncated files varies by codec.
_DECODE_ERRORS = (OSError, SyntaxError, ValueError, EOFError, struct.error, IndexError, zlib.error,
                  TypeError, KeyError, MemoryError)


@dataclass(frozen=True, eq=False)
class Page:
    """One scanned page.

    gray : ndarray of shape (H, W), uint8, 0 = ink, 255 = paper
    dpi : resolution in dots per inch (square pixels)
    source : the file it came from
    page_number : 1-based page number within that file
    """
    gray: np.ndarray
    dpi: float
    source: str
    page_number: int = 1

    @property
    def label(self) -> str:
        """``<file> page N`` for messages."""
        return f"{self.source} page {self.page_number}"


def load_pages(path, *, dpi: float | None = None, pdf_dpi: float = 200.0) -> list[Page]:
    """All pages of a scan file, in order. See ``iter_pages``."""
    return list(iter_pages(path, dpi=dpi, pdf_dpi=pdf_dpi))


def iter_pages(path, *, dpi: float | None = None, pdf_dpi: float = 200.0) -> Iterator[Page]:
    """Yield the pages of a PNG, JPEG, TIFF or PDF file one at a time (a long TIFF is not held whole).

    path : the file
    dpi : resolution to assume, overriding the file's; for a PDF, the resolution to render at
    pdf_dpi : resolution to render PDF pages at when ``dpi`` is not given
    Raises ``ImageError("<file>[ page N]: <problem>")``.
    """
    check_param(dpi is None or (isinstance(dpi, (int, float)) and _DPI_RANGE[0] <= dpi <= _DPI_RANGE[1]),
                "dpi", f"None or a number in {_DPI_RANGE[0]:g}..{_DPI_RANGE[1]:g}", dpi)
    check_param(isinstance(pdf_dpi, (int, float)) and _DPI_RANGE[0] <= pdf_dpi <= 1200,
                "pdf_dpi", f"a number in {_DPI_RANGE[0]:g}..1200", pdf_dpi)
    path = Path(path)
    src = str(path)
    if not path.exists():
        raise ImageError(f"{src}: no such file")
    if path.is_dir():
        raise ImageError(f"{src}: is a directory, not a scan file")
    try:
        with open(path, "rb") as fh:
            head = fh.read(1024)
    except OSError as e:
        raise ImageError(f"{src}: cannot be read ({e.strerror or e})") from None
    if not head:
        raise ImageError(f"{src}: empty file (0 bytes)")
    if b"%PDF-" in head:
        yield from _pdf_pages(path, src, float(dpi if dpi is not None else pdf_dpi))
    else:
        yield from _image_pages(path, src, dpi)


# --------------------------------------------------------------------------------------- raster files

def _image_pages(path: Path, src: str, dpi: float | None) -> Iterator[Page]:
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        warnings.simplefilter("error", Image.DecompressionBombWarning)
        try:
            im = Image.open(path, formats=IMAGE_FORMATS)
        except Image.DecompressionBombWarning as e:
            raise ImageError(f"{src}: image too large ({_bomb(e)}); refused as a possible decompression bomb") from None
        except Image.DecompressionBombError as e:
            raise ImageError(f"{src}: image too large ({_bomb(e)}); refused as a possible decompression bomb") from None
        except Image.UnidentifiedImageError:
            raise ImageError(f"{src}: not a PNG, JPEG, TIFF or PDF file (or damaged beyond recognition)") from None
        except _DECODE_ERRORS as e:
            raise ImageError(f"{src}: cannot be opened ({_why(e)})") from None
        _log_warnings(caught, src)
    with im:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            try:  # counting a TIFF's pages walks its directory chain, which may be damaged
                n = getattr(im, "n_frames", 1) if im.format == "TIFF" else 1
            except _DECODE_ERRORS as e:
                raise ImageError(f"{src}: cannot read the list of pages ({_why(e)})") from None
            _log_warnings(caught, src)
        for i in range(n):
            where = f"{src} page {i + 1}" if n > 1 else src
            with warnings.catch_warnings(record=True) as caught:
                warnings.simplefilter("always")
                warnings.simplefilter("error", Image.DecompressionBombWarning)
                try:
                    if i:
                        im.seek(i)
                    w, h = im.size
                    if w * h > MAX_PAGE_PIXELS:
                        raise ImageError(f"{where}: image too large ({w} x {h} pixels; the limit is "
                                         f"{MAX_PAGE_PIXELS:,} pixels)")
                    if w < 1 or h < 1:
                        raise ImageError(f"{where}: image has no pixels ({w} x {h})")
                    page_dpi = dpi if dpi is not None else _file_dpi(im.info)
                    aspect = _aspect(im.info)
                    im.load()
                    frame = ImageOps.exif_transpose(im)
                    gray = _to_gray(frame, where)
                except ImageError:
                    raise
                except (Image.DecompressionBombWarning, Image.DecompressionBombError) as e:
                    raise ImageError(f"{where}: image too large ({_bomb(e)}); refused as a possible "
                                     f"decompression bomb") from None
                except _DECODE_ERRORS as e:
                    raise ImageError(f"{where}: cannot be decoded ({_why(e)})") from None
                _log_warnings(caught, where)
            if aspect is not None and dpi is None:
                gray = _square_pixels(gray, aspect, where)
            yield Page(gray=gray, dpi=float(page_dpi), source=src, page_number=i + 1)


def _file_dpi(info: dict) -> float:
    """The horizontal resolution the file states, or FALLBACK_DPI when absent or implausible."""
    d = info.get("dpi")
    if d is None:
        return FALLBACK_DPI
    try:
        x = float(d[0])
    except (TypeError, ValueError, IndexError):
        return FALLBACK_DPI
    return x if _DPI_RANGE[0] <= x <= _DPI_RANGE[1] else FALLBACK_DPI


def _aspect(info: dict) -> float | None:
    """ydpi / xdpi when the file states non-square pixels (beyond 1 %), else None."""
    d = info.get("dpi")
    if d is None:
        return None
    try:
        x, y = float(d[0]), float(d[1])
    except (TypeError, ValueError, IndexError):
        return None
    if not (_DPI_RANGE[0] <= x <= _DPI_RANGE[1] and _DPI_RANGE[0] <= y <= _DPI_RANGE[1]):
        return None
    r = y / x
    return r if abs(r - 1.0) > 0.01 else None


def _square_pixels(gray: np.ndarray, aspect: float, where: str) -> np.ndarray:
    """Resample rows so pixels become square at the horizontal resolution (``aspect`` = ydpi / xdpi)."""
    h, w = gray.shape
    new_h = max(1, int(round(h / aspect)))
    if new_h * w > MAX_PAGE_PIXELS:
        raise ImageError(f"{where}: image too large once resampled to square pixels ({w} x {new_h})")
    return np.asarray(Image.fromarray(gray).resize((w, new_h), Image.Resampling.BILINEAR))


def _to_gray(im: Image.Image, where: str) -> np.ndarray:
    """(H, W) uint8 grey of a Pillow image of any supported mode; transparent areas become paper."""
    mode = im.mode
    if mode in ("1", "L"):
        return np.array(im.convert("L"), dtype=np.uint8)
    if mode.startswith("I;16") or mode == "I":
        a = np.asarray(im)
        if a.dtype.byteorder not in ("=", "|"):
            a = a.astype(a.dtype.newbyteorder("="))
        a = a.astype(np.int64)
        if mode == "I" and a.size and (a.min() < 0 or a.max() > 65535):
            raise ImageError(f"{where}: unsupported image mode 'I' with values outside 0..65535")
        return ((a * 255 + 32767) // 65535).astype(np.uint8)  # 16-bit grey -> 8-bit, rounded
    if mode in ("LA", "La", "PA", "RGBA", "RGBa") or (mode == "P" and "transparency" in im.info):
        rgba = im.convert("RGBA")
        white = Image.new("RGBA", rgba.size, (255, 255, 255, 255))
        return np.array(Image.alpha_composite(white, rgba).convert("L"), dtype=np.uint8)
    if mode in ("P", "RGB", "RGBX", "CMYK", "YCbCr"):
        return np.array(im.convert("RGB").convert("L"), dtype=np.uint8)
    raise ImageError(f"{where}: unsupported image mode {mode!r} (use grey, bilevel, RGB, palette or CMYK)")


def _log_warnings(caught, where: str) -> None:
    for w in caught:
        log.warning("%s: %s", where, w.message)


def _bomb(e: BaseException) -> str:
    """'N pixels' from Pillow's decompression-bomb message."""
    m = re.search(r"\((\d+) pixels\)", str(e))
    return f"{int(m.group(1)):,} pixels" if m else _why(e)


def _why(e: BaseException) -> str:
    text = one_line(e)
    return text if len(text) < 160 else text[:157] + "..."


# ---------------------------------------------------------------------------------------------- PDF

def _pdf_pages(path: Path, src: str, dpi: float) -> Iterator[Page]:
    import pypdfium2 as pdfium  # here: PDFium's native library is loaded only when a PDF is read

    try:
        doc = pdfium.PdfDocument(str(path))
    except pdfium.PdfiumError as e:
        # PDFium's error code is global state and can be stale, so the file itself is checked too.
        code = getattr(e, "err_code", None)
        head, tail = _ends(path)
        if code in (_PDF_ERR_PASSWORD, _PDF_ERR_SECURITY) and (b"/Encrypt" in head or b"/Encrypt" in tail):
            raise ImageError(f"{src}: encrypted PDF (needs a password); save an unprotected copy") from None
        counts = re.findall(rb"/Count\s+(\d+)", head + tail)
        if counts and all(int(c) == 0 for c in counts):  # PDFium refuses an empty page tree
            raise ImageError(f"{src}: PDF has no pages") from None
        raise ImageError(f"{src}: damaged or unreadable PDF") from None
    try:
        n = len(doc)
        if n == 0:
            raise ImageError(f"{src}: PDF has no pages")
        scale = dpi / 72.0
        for i in range(n):
            where = f"{src} page {i + 1}"
            try:
                page = doc[i]
                try:
                    w_pt, h_pt = page.get_size()  # already turned by the page's /Rotate
                    w, h = int(round(w_pt * scale)), int(round(h_pt * scale))
                    if w < 1 or h < 1:
                        raise ImageError(f"{where}: page has no area ({w_pt:g} x {h_pt:g} pt)")
                    if w * h > MAX_PAGE_PIXELS:
                        raise ImageError(f"{where}: page too large at {dpi:g} dpi ({w} x {h} pixels; the "
                                         f"limit is {MAX_PAGE_PIXELS:,} pixels)")
                    bitmap = page.render(scale=scale, grayscale=True)
                    gray = _bitmap_gray(bitmap)
                    bitmap.close()
                finally:
                    page.close()
            except ImageError:
                raise
            except (pdfium.PdfiumError, ValueError, OSError) as e:
                raise ImageError(f"{where}: cannot be rendered ({_why(e)})") from None
            yield Page(gray=gray, dpi=dpi, source=src, page_number=i + 1)
    finally:
        doc.close()


_PDF_ERR_PASSWORD, _PDF_ERR_SECURITY = 4, 5  # PDFium's FPDF_ERR_PASSWORD and FPDF_ERR_SECURITY


def _ends(path: Path) -> tuple[bytes, bytes]:
    """The first and last megabyte of a file (a PDF's trailer and page-tree root are usually there)."""
    with open(path, "rb") as fh:
        head = fh.read(1 << 20)
        fh.seek(0, 2)
        size = fh.tell()
        fh.seek(max(len(head), size - (1 << 20)))
        tail = fh.read()
    return head, tail


def _bitmap_gray(bitmap) -> np.ndarray:
    """(H, W) uint8 grey from a pypdfium2 bitmap (grey, or BGR(A/X) if the renderer chose colour)."""
    a = np.asarray(bitmap.to_numpy())
    if a.ndim == 2:
        return np.ascontiguousarray(a, dtype=np.uint8)
    bgr = a[..., :3].astype(np.float32)  # pdfium's colour bitmaps are B, G, R order
    y = 0.114 * bgr[..., 0] + 0.587 * bgr[..., 1] + 0.299 * bgr[..., 2]
    return np.clip(np.rint(y), 0, 255).astype(np.uint8)
