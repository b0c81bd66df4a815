"""Loading scans: every supported file kind becomes grey pages; every bad file one line naming it."""

from __future__ import annotations

import struct
import zlib

import numpy as np
import pytest
from PIL import Image
from synth import Transform, example_layout, render_page

from formread.errors import ImageError, ParameterError
from formread.imaging import load as load_mod
from formread.imaging.load import FALLBACK_DPI, Page, iter_pages, load_pages
from formread.imaging.register import register_page


def _pages(seed=0, n=3, shape=(120, 90)) -> list[np.ndarray]:
    rng = np.random.default_rng(seed)
    return [np.clip(rng.normal(170, 60, shape), 0, 255).astype(np.uint8) for _ in range(n)]


# ------------------------------------------------------------------------------------ good files

def test_multipage_group4_tiff_decodes_pixel_for_pixel(tmp_path):
    rng = np.random.default_rng(1)
    bits = [rng.random((150, 113)) > 0.3 for _ in range(3)]
    ims = [Image.fromarray(b.astype(np.uint8) * 255).convert("1") for b in bits]
    path = tmp_path / "batch.tif"
    ims[0].save(path, compression="group4", save_all=True, append_images=ims[1:], dpi=(200, 200))
    with Image.open(path) as check:
        assert check.info.get("compression") == "group4"
    pages = load_pages(path)
    assert [p.page_number for p in pages] == [1, 2, 3]
    for p, b in zip(pages, bits):
        assert p.gray.dtype == np.uint8 and p.dpi == pytest.approx(200)
        assert p.source == str(path)
        np.testing.assert_array_equal(p.gray, np.where(b, 255, 0).astype(np.uint8))


def test_pdf_made_with_pillow_round_trips_page_count_and_size(tmp_path):
    grays = _pages(2, n=2, shape=(300, 200))
    grays[1][50:150, 40:120] = 0
    path = tmp_path / "scan.pdf"
    ims = [Image.fromarray(g) for g in grays]
    ims[0].save(path, save_all=True, append_images=ims[1:], resolution=100)  # 2 x 3 inches
    pages = load_pages(path, pdf_dpi=150)
    assert len(pages) == 2 and [p.page_number for p in pages] == [1, 2]
    for p in pages:
        assert p.dpi == 150.0
        assert abs(p.gray.shape[0] - 450) <= 1 and abs(p.gray.shape[1] - 300) <= 1
    # The black block lands where it was, scaled by 1.5.
    assert pages[1].gray[100:220, 66:174].mean() < 20
    # dpi= is the render resolution for a PDF.
    assert abs(load_pages(path, dpi=72)[0].gray.shape[0] - 216) <= 1


@pytest.mark.parametrize("mode", ["L", "I;16", "RGB", "P", "CMYK", "1", "LA", "RGBA"])
def test_tiff_modes_become_grey(tmp_path, mode):
    g = _pages(3, n=1)[0]
    if mode == "I;16":
        im = Image.fromarray(g.astype(np.uint16) * 257)
        assert im.mode.startswith("I;16")
        want = g
    elif mode == "1":
        im = Image.fromarray((g > 128).astype(np.uint8) * 255).convert("1")
        want = np.where(g > 128, 255, 0)
    elif mode in ("LA", "RGBA"):
        im = Image.fromarray(g).convert(mode)
        alpha = np.full(g.shape, 255, np.uint8)
        alpha[:10] = 0  # transparent rows are paper
        im.putalpha(Image.fromarray(alpha))
        want = g.copy()
        want[:10] = 255
    else:
        im = Image.fromarray(g).convert(mode)
        want = np.asarray(Image.fromarray(g).convert(mode).convert("RGB").convert("L"))
    path = tmp_path / f"page-{mode.replace(';', '')}.tif"
    im.save(path, dpi=(300, 300))
    (p,) = load_pages(path)
    assert p.gray.shape == g.shape and p.gray.dtype == np.uint8
    assert np.abs(p.gray.astype(int) - want.astype(int)).max() <= 1


def test_png_dpi_from_file_override_and_fallback(tmp_path):
    g = _pages(4, n=1)[0]
    with_dpi = tmp_path / "with.png"
    Image.fromarray(g).save(with_dpi, dpi=(200, 200))
    (p,) = load_pages(with_dpi)
    assert p.dpi == pytest.approx(200, abs=0.01)  # PNG stores pixels per metre
    np.testing.assert_array_equal(p.gray, g)
    assert load_pages(with_dpi, dpi=150)[0].dpi == 150.0
    without = tmp_path / "without.png"
    Image.fromarray(g).save(without)
    assert load_pages(without)[0].dpi == FALLBACK_DPI == 300.0
    with pytest.raises(ParameterError, match="parameter 'dpi'"):
        load_pages(without, dpi=5)


def test_jpeg_exif_orientation_is_respected(tmp_path):
    g = np.full((40, 60), 255, np.uint8)
    g[:10, :10] = 0  # a dark block at the top-left of the stored pixels
    exif = Image.Exif()
    exif[0x0112] = 6  # EXIF orientation 6: display rotated 90 degrees clockwise
    path = tmp_path / "phone.jpg"
    Image.fromarray(g).convert("RGB").save(path, exif=exif, dpi=(240, 240), quality=95)
    (p,) = load_pages(path)
    assert p.gray.shape == (60, 40) and p.dpi == pytest.approx(240)
    assert p.gray[:10, -10:].mean() < 60 and p.gray[-10:, :10].mean() > 200  # now top-right


def test_non_square_pixels_are_resampled(tmp_path):
    g = _pages(5, n=1, shape=(100, 204))[0]
    path = tmp_path / "fax.tif"
    Image.fromarray(g).save(path, dpi=(204, 98))
    (p,) = load_pages(path)
    assert p.dpi == pytest.approx(204) and p.gray.shape == (208, 204)


def test_iter_pages_is_lazy_and_a_loaded_scan_registers(tmp_path):
    lay = example_layout()
    gray, _ = render_page(lay, 200, {"member": "12345678"}, np.random.default_rng(6),
                          Transform(rotation_deg=1.5, margin_mm=5))
    ims = [Image.fromarray(gray).point(lambda v: 255 if v > 128 else 0).convert("1")] * 2
    path = tmp_path / "cards.tif"
    ims[0].save(path, compression="group4", save_all=True, append_images=ims[1:], dpi=(200, 200))
    it = iter_pages(path)
    first = next(it)
    assert isinstance(first, Page) and first.page_number == 1
    reg = register_page(first, lay)
    assert reg.marks_found == 4 and reg.residual_mm < 0.2
    assert next(it).page_number == 2


# ------------------------------------------------------------------------------------- bad files

def _one_line(info, start: str) -> str:
    msg = str(info.value)
    assert "\n" not in msg and msg.startswith(start), msg
    return msg


def test_zero_byte_missing_and_directory(tmp_path):
    empty = tmp_path / "empty.png"
    empty.write_bytes(b"")
    with pytest.raises(ImageError) as info:
        load_pages(empty)
    assert _one_line(info, f"{empty}: ") == f"{empty}: empty file (0 bytes)"
    with pytest.raises(ImageError, match="no such file"):
        load_pages(tmp_path / "nope.tif")
    with pytest.raises(ImageError, match="is a directory"):
        load_pages(tmp_path)


def test_text_file_named_png(tmp_path):
    path = tmp_path / "notes.png"
    path.write_text("meter readings: 1234\n", encoding="utf-8")
    with pytest.raises(ImageError) as info:
        load_pages(path)
    assert "not a PNG, JPEG, TIFF or PDF file" in _one_line(info, f"{path}: ")


def test_truncated_png(tmp_path):
    path = tmp_path / "cut.png"
    Image.fromarray(_pages(7, n=1, shape=(200, 200))[0]).save(path)
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    with pytest.raises(ImageError) as info:
        load_pages(path)
    assert "truncated" in _one_line(info, f"{path}: ")


def test_truncated_tiff(tmp_path):
    path = tmp_path / "cut.tif"
    ims = [Image.fromarray(g) for g in _pages(8, n=3, shape=(200, 200))]
    ims[0].save(path, save_all=True, append_images=ims[1:], compression="tiff_deflate")
    data = path.read_bytes()
    path.write_bytes(data[: int(len(data) * 0.6)])
    with pytest.raises(ImageError) as info:
        load_pages(path)
    _one_line(info, f"{path}")


def test_truncated_pdf(tmp_path):
    path = tmp_path / "cut.pdf"
    Image.fromarray(_pages(9, n=1)[0]).save(path, resolution=100)
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    with pytest.raises(ImageError) as info:
        load_pages(path)
    assert "damaged or unreadable PDF" in _one_line(info, f"{path}: ")


def _write_pdf(path, objects: list[str], trailer_extra: str = "") -> None:
    """A small PDF written by hand: numbered objects, a correct cross-reference table and trailer."""
    out = b"%PDF-1.4\n"
    offsets = []
    for i, body in enumerate(objects, 1):
        offsets.append(len(out))
        out += f"{i} 0 obj\n{body}\nendobj\n".encode("latin-1")
    xref = len(out)
    out += f"xref\n0 {len(objects) + 1}\n0000000000 65535 f \n".encode()
    out += b"".join(f"{o:010d} 00000 n \n".encode() for o in offsets)
    out += (f"trailer\n<< /Size {len(objects) + 1} /Root 1 0 R {trailer_extra}>>\n"
            f"startxref\n{xref}\n%%EOF\n").encode()
    path.write_bytes(out)


def test_encrypted_pdf_is_refused(tmp_path):
    # Nothing installed can write an encrypted PDF (pypdfium2 cannot encrypt), so this one is written by
    # hand: the standard security handler's dictionary (PDF 1.4 reference, section 3.5.2: /Filter
    # /Standard, /V 1, /R 2, /O and /U 32-byte strings, /P permissions). /U does not match the empty
    # user password, so a reader needs a password to open it.
    path = tmp_path / "locked.pdf"
    o = "<" + "A1" * 32 + ">"
    u = "<" + "5C" * 32 + ">"
    _write_pdf(path, ["<< /Type /Catalog /Pages 2 0 R >>",
                      "<< /Type /Pages /Kids [3 0 R] /Count 1 >>",
                      "<< /Type /Page /Parent 2 0 R /MediaBox [0 0 144 144] >>",
                      f"<< /Filter /Standard /V 1 /R 2 /O {o} /U {u} /P -44 >>"],
               trailer_extra="/Encrypt 4 0 R /ID [<0123456789ABCDEF0123456789ABCDEF> "
                             "<0123456789ABCDEF0123456789ABCDEF>] ")
    with pytest.raises(ImageError) as info:
        load_pages(path)
    assert _one_line(info, f"{path}: ") == f"{path}: encrypted PDF (needs a password); save an unprotected copy"


def test_hand_written_pdf_loads_and_empty_pdf_is_refused(tmp_path):
    ok = tmp_path / "one.pdf"
    _write_pdf(ok, ["<< /Type /Catalog /Pages 2 0 R >>", "<< /Type /Pages /Kids [3 0 R] /Count 1 >>",
                    "<< /Type /Page /Parent 2 0 R /MediaBox [0 0 144 72] >>"])
    (p,) = load_pages(ok, pdf_dpi=100)  # the writer above is sound: a 2 x 1 inch blank page
    assert p.gray.shape == (100, 200) and p.gray.min() == 255
    turned = tmp_path / "turned.pdf"  # a page with /Rotate 90 comes out turned
    _write_pdf(turned, ["<< /Type /Catalog /Pages 2 0 R >>", "<< /Type /Pages /Kids [3 0 R] /Count 1 >>",
                        "<< /Type /Page /Parent 2 0 R /MediaBox [0 0 144 72] /Rotate 90 >>"])
    assert load_pages(turned, pdf_dpi=100)[0].gray.shape == (200, 100)
    empty = tmp_path / "empty.pdf"
    _write_pdf(empty, ["<< /Type /Catalog /Pages 2 0 R >>", "<< /Type /Pages /Kids [] /Count 0 >>"])
    with pytest.raises(ImageError) as info:
        load_pages(empty)
    assert _one_line(info, f"{empty}: ").startswith(f"{empty}: PDF has no pages")


def _png_header_only(path, width: int, height: int) -> None:
    """A PNG that claims ``width`` x ``height`` grey pixels and holds almost no data (a bomb's shape)."""
    def chunk(kind: bytes, data: bytes) -> bytes:
        return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data))
    ihdr = struct.pack(">IIBBBBB", width, height, 8, 0, 0, 0, 0)
    path.write_bytes(b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", ihdr) + chunk(b"IDAT", zlib.compress(b"\0" * 64))
                     + chunk(b"IEND", b""))


def test_oversized_images_are_refused_not_decoded(tmp_path, monkeypatch):
    bomb = tmp_path / "bomb.png"
    _png_header_only(bomb, 40_000, 40_000)  # 1.6 billion pixels: Pillow's own guard refuses it
    with pytest.raises(ImageError) as info:
        load_pages(bomb)
    assert _one_line(info, f"{bomb}: ") == (f"{bomb}: image too large (1,600,000,000 pixels); refused as a "
                                            f"possible decompression bomb")
    big = tmp_path / "big.png"
    _png_header_only(big, 9_500, 8_800)  # 83.6 million pixels: above formread's page limit
    with pytest.raises(ImageError) as info:
        load_pages(big)
    assert "image too large (9500 x 8800 pixels; the limit is 80,000,000 pixels)" in _one_line(info, f"{big}: ")
    # The same limit guards PDF rendering, checked before rendering.
    monkeypatch.setattr(load_mod, "MAX_PAGE_PIXELS", 10_000)
    pdf = tmp_path / "page.pdf"
    Image.fromarray(_pages(10, n=1)[0]).save(pdf, resolution=100)
    with pytest.raises(ImageError) as info:
        load_pages(pdf, pdf_dpi=200)
    assert "page too large at 200 dpi" in _one_line(info, f"{pdf} page 1: ")


def test_unsupported_mode_is_refused(tmp_path):
    path = tmp_path / "float.tif"
    Image.fromarray(np.random.default_rng(11).random((20, 20)).astype(np.float32)).save(path)
    with pytest.raises(ImageError) as info:
        load_pages(path)
    assert _one_line(info, f"{path}: ").endswith("unsupported image mode 'F' (use grey, bilevel, RGB, palette or CMYK)")


def test_bad_page_in_a_multipage_tiff_names_the_page(tmp_path):
    path = tmp_path / "mixed.tif"
    ims = [Image.fromarray(_pages(12, n=1)[0]),
           Image.fromarray(np.random.default_rng(12).random((120, 90)).astype(np.float32))]
    ims[0].save(path, save_all=True, append_images=ims[1:])
    it = iter_pages(path)
    assert next(it).page_number == 1
    with pytest.raises(ImageError) as info:
        next(it)
    assert "unsupported image mode 'F'" in _one_line(info, f"{path} page 2: ")
