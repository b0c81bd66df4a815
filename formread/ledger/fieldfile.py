"""The digit file of one read field (``digits/<page>/<field>.npz``): what the network saw, kept whole.

Why whole: learning from a clerk's decisions needs more than the digits of the reading.  A
field whose segmentation had another digit count than the decided value is re-segmented to
that count (the touching and broken digits the network most needs to learn), and the held-out
pages of a learning step are read again by the new network (every candidate split, to refit the
decisions).  So the file keeps every candidate segmentation's digit images, their costs, the
boxed cells' blank flags, and for open fields the field crop (grey and ink) the candidates were
cut from (a boxed field's cells are all among its digits already).

Arrays (an ``.npz``; no pickle):

=================  ==========================  ==================================================
``positions``      (K,) int64                  the reading's digits: rows of the chosen candidate,
                                               one per character, in order
``chosen``         () int64                    index of the candidate the reading came from (-1: none)
``cand_digits``    (N, 28, 28) uint8           every candidate's digits, concatenated (x 255)
``cand_spans``     (C, 2) int64                rows of ``cand_digits`` of each candidate
``cand_costs``     (C,) float64                each candidate's segmentation cost
``blank``          (M,) bool                   boxed fields: blank cells (empty for open fields)
``doubtful``       () bool, ``reason`` () str  segmentation's own doubt
``crop_gray``      (h, w) uint8                the field crop, 0 = ink (no outlines); paper further
                                               than 2 px from ink is stored white (it compresses
                                               ten times better, and no digit image uses it)
``crop_ink``       (h, w) bool                 its binarised ink
``crop_rect``      (4,) float64                field rectangle in crop px
``crop_geometry``  (3,) float64                x0_mm, y0_mm, px_per_mm of the crop
``crop_matrix``    (2, 3) float64              the page registration it was cut with
=================  ==========================  ==================================================

Files written by the first release hold ``digits`` ((K, 1, 28, 28) float32, the reading's digits)
and ``positions`` only; they still give the reading's digits (:func:`load_digits`), and
:func:`load_field_file` gives None for the rest.
"""

from __future__ import annotations

import io
import zipfile
from dataclasses import dataclass

import numpy as np

from ..errors import LedgerError

__all__ = ["FieldFile", "load_field_file", "load_digits"]

_SIZE = 28
_DEFLATE_LEVEL = 1


def _within_two(ink: np.ndarray) -> np.ndarray:
    """(h, w) bool -> (h, w) bool: pixels at most two 4-neighbour steps from ink, as
    ``scipy.ndimage.binary_dilation(ink, iterations=2)`` gives it, by 13 shifted ORs (5x faster)."""
    h, w = ink.shape
    out = ink.copy()
    for dr in range(-2, 3):
        for dc in range(abs(dr) - 2, 3 - abs(dr)):
            if dr or dc:
                out[max(0, dr):h + min(0, dr), max(0, dc):w + min(0, dc)] |= \
                    ink[max(0, -dr):h + min(0, -dr), max(0, -dc):w + min(0, -dc)]
    return out


@dataclass
class FieldFile:
    """One field's digit file in memory (see the module docstring for shapes and dtypes)."""

    digits: np.ndarray
    positions: np.ndarray
    chosen: int = -1
    cand_digits: np.ndarray | None = None
    cand_spans: np.ndarray | None = None
    cand_costs: np.ndarray | None = None
    blank: np.ndarray | None = None
    doubtful: bool = False
    reason: str = ""
    crop_gray: np.ndarray | None = None
    crop_ink: np.ndarray | None = None
    crop_rect: np.ndarray | None = None
    crop_geometry: np.ndarray | None = None
    crop_matrix: np.ndarray | None = None

    @property
    def whole(self) -> bool:
        """True when the file holds the candidates and the crop (written since schema version 2)."""
        return self.cand_digits is not None and self.crop_gray is not None

    def candidates(self) -> list[tuple[np.ndarray, float]]:
        """Every candidate's digits as ((K_i, 1, 28, 28) float32 in [0, 1], cost), in stored order."""
        assert self.cand_spans is not None and self.cand_costs is not None and self.cand_digits is not None, \
            "candidates of a file written before schema version 2"
        out = []
        for (a, b), c in zip(self.cand_spans, self.cand_costs):
            d = self.cand_digits[a:b].astype(np.float32)[:, None] / np.float32(255.0)
            out.append((d, float(c)))
        return out

    def to_bytes(self) -> bytes:
        """The ``.npz`` bytes of the file (compressed)."""
        arrays = {"positions": np.asarray(self.positions, np.int64).reshape(-1), "chosen": np.int64(self.chosen)}
        if self.cand_digits is None:
            arrays["digits"] = np.asarray(self.digits, np.float32).reshape(-1, 1, _SIZE, _SIZE)
        else:
            arrays.update(
                cand_digits=np.asarray(self.cand_digits, np.uint8).reshape(-1, _SIZE, _SIZE),
                cand_spans=np.asarray(self.cand_spans, np.int64).reshape(-1, 2),
                cand_costs=np.asarray(self.cand_costs, np.float64).reshape(-1),
                blank=np.asarray(self.blank if self.blank is not None else [], bool).reshape(-1),
                doubtful=np.bool_(self.doubtful), reason=np.str_(self.reason or ""))
        if self.crop_gray is not None:
            ink = np.asarray(self.crop_ink, bool)
            near = _within_two(ink)
            gray = np.where(near, np.asarray(self.crop_gray, np.uint8), np.uint8(255))
            arrays.update(crop_gray=gray, crop_ink=ink,
                          crop_rect=np.asarray(self.crop_rect, np.float64).reshape(4),
                          crop_geometry=np.asarray(self.crop_geometry, np.float64).reshape(3),
                          crop_matrix=np.asarray(self.crop_matrix, np.float64).reshape(2, 3))
        buf = io.BytesIO()
        # np.savez_compressed's archive, deflated at level 1 instead of 6: the same arrays and format,
        # about 2 ms less per page for files a few percent larger
        with zipfile.ZipFile(buf, "w", compression=zipfile.ZIP_DEFLATED, compresslevel=_DEFLATE_LEVEL) as zf:
            for key, value in arrays.items():
                with zf.open(key + ".npy", "w", force_zip64=True) as fh:
                    np.lib.format.write_array(fh, np.asanyarray(value), allow_pickle=False)
        return buf.getvalue()


def _read(path) -> dict:
    try:
        with open(path, "rb") as fh:          # closed even when the archive is damaged
            z = np.load(fh, allow_pickle=False)
            if not isinstance(z, np.lib.npyio.NpzFile):
                raise ValueError("not an .npz archive")
            with z:
                return {k: z[k] for k in z.files}
    except (OSError, ValueError, EOFError, zipfile.BadZipFile) as e:
        raise LedgerError(f"{path}: digit images cannot be read ({e.__class__.__name__})") from None


def _digits(path, arrays: dict) -> np.ndarray:
    if "digits" not in arrays and "cand_digits" in arrays:      # the reading's digits, from its candidate
        chosen, pos = int(arrays.get("chosen", -1)), arrays.get("positions", np.zeros(0, np.int64))
        spans = arrays["cand_spans"]
        if chosen < 0:
            return np.zeros((0, 1, _SIZE, _SIZE), np.float32)
        if not (chosen < len(spans) and ((pos >= 0) & (pos < spans[chosen][1] - spans[chosen][0])).all()):
            raise LedgerError(f"{path}: damaged digit file (the reading's digits are not in its candidate)")
        return arrays["cand_digits"][spans[chosen][0] + pos].astype(np.float32)[:, None] / np.float32(255.0)
    key = "digits" if "digits" in arrays else (next(iter(arrays)) if len(arrays) == 1 else None)
    if key is None:
        raise LedgerError(f"{path}: no 'digits' array (has {', '.join(arrays)})")
    x = arrays[key]
    if x.ndim == 3:
        x = x[:, None]
    if x.ndim != 4 or x.shape[1:] != (1, _SIZE, _SIZE) or not np.issubdtype(x.dtype, np.number):
        raise LedgerError(f"{path}: digit images have shape {x.shape}, expected (K, 1, 28, 28)")
    if not np.isfinite(x).all() or (x.size and (x.min() < 0 or x.max() > 1)):
        raise LedgerError(f"{path}: digit image values must lie in [0, 1]")
    return x.astype(np.float32, copy=False)


def load_digits(path) -> np.ndarray:
    """The reading's digit images of a field.

    Returns
    -------
    ndarray of shape (K, 1, 28, 28), float32

    Raises
    ------
    LedgerError
        When the file is missing, not an .npz, or holds no (K, 1, 28, 28) array.
    """
    return _digits(path, _read(path))


def load_field_file(path) -> FieldFile:
    """The whole digit file of a field (candidates and crop are None in first-release files).

    Raises
    ------
    LedgerError
        A missing, unreadable or inconsistent file.
    """
    a = _read(path)
    digits = _digits(path, a)
    out = FieldFile(digits=digits, positions=a.get("positions", np.arange(len(digits))).astype(np.int64),
                    chosen=int(a.get("chosen", -1)))
    if "cand_digits" in a:
        cd, spans, costs = a["cand_digits"], a["cand_spans"], a["cand_costs"]
        ok = (cd.ndim == 3 and cd.shape[1:] == (_SIZE, _SIZE) and cd.dtype == np.uint8 and spans.ndim == 2
              and spans.shape[1] == 2 and len(costs) == len(spans) and np.isfinite(costs).all()
              and (spans >= 0).all() and (spans[:, 0] <= spans[:, 1]).all() and (spans[:, 1] <= len(cd)).all())
        if not ok:
            raise LedgerError(f"{path}: damaged digit file (candidates do not fit together)")
        out.cand_digits, out.cand_spans, out.cand_costs = cd, spans.astype(np.int64), costs.astype(np.float64)
        out.blank = a["blank"].astype(bool)
        out.doubtful, out.reason = bool(a.get("doubtful", False)), str(a.get("reason", ""))
    if "crop_gray" in a:
        g, ink = a["crop_gray"], a["crop_ink"]
        if g.ndim != 2 or g.dtype != np.uint8 or ink.shape != g.shape:
            raise LedgerError(f"{path}: damaged digit file (field crop)")
        out.crop_gray, out.crop_ink = g, ink.astype(bool)
        out.crop_rect, out.crop_geometry, out.crop_matrix = a["crop_rect"], a["crop_geometry"], a["crop_matrix"]
    return out
