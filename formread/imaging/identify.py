"""Which form is this page? Register it against every candidate layout and keep the one it fits.

A scanner tray holds whatever arrived. Each page is registered against every candidate layout
(``register_page``, in any quarter turn) and each registration is checked against what the layout
says is printed on the form:

* the marks: at least 3 found, fitted within ``MAX_RESIDUAL_MM`` (RMS);
* the printed lines: every field rectangle's border and every boxed cell's divider is sampled every
  half millimetre, and a sample counts when there is ink within ``LINE_REACH_MM`` across the line;
  the share found must reach ``MIN_LINES``. A layout whose marks happen to fit a page of another
  form (marks a few mm apart are absorbed as a little scale or stretch) puts its lines where the
  page has none;
* the header: with a fingerprint (``[form.header] fingerprint``, see ``fingerprint.py``) the page's
  header must match it by at least ``MIN_HEADER``; without one, the header region must hold some
  print (``MIN_HEADER_INK``).

A page fits a layout when all of these hold. When exactly one layout fits, the page is that form.
When several fit, one is chosen only if it is told apart from every other one by evidence both
have: more of the printed lines found (by ``TELL_LINES``) or a better header match (by
``TELL_HEADER``, both with fingerprints), and no other is better than it in the same way.
Otherwise the answer is "ambiguous", never a guess; when none fits, "unknown" with the best
candidate's residual and the reason it failed. The thresholds were chosen on development pages
(synthetic test forms and development demo cards, seeds 101 and 102), see benchmarks/identify.py.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass

import numpy as np

from ..errors import RegistrationError, check_param
from ..form.layout import Layout
from .fingerprint import InkMap, compare_header
from .load import Page
from .register import Registration, apply_affine, register_page

__all__ = ["Identification", "Evidence", "identify_form", "line_share", "STATUSES",
           "MAX_RESIDUAL_MM", "MIN_LINES", "MIN_HEADER", "MIN_HEADER_INK", "TELL_LINES", "TELL_HEADER",
           "LINE_STEP_MM", "LINE_REACH_MM"]

log = logging.getLogger(__name__)

STATUSES = ("identified", "unknown", "ambiguous")
MAX_RESIDUAL_MM = 0.5     # RMS of the fitted marks (synthetic and demo scans: under 0.05 mm; margin for real ones)
MIN_LINES = 0.85          # share of the printed lines' samples with ink nearby
MIN_HEADER = 0.8          # match with the header fingerprint (fingerprint.fingerprint_match)
MIN_HEADER_INK = 0.01     # ink share of a header region without a fingerprint
TELL_LINES = 0.08         # more lines found by this much tells two fitting layouts apart
TELL_HEADER = 0.10        # a better header match by this much tells them apart
LINE_STEP_MM = 0.5        # samples along a printed line
LINE_REACH_MM = 0.5       # how far across the line ink is looked for


@dataclass(frozen=True)
class Evidence:
    """How one candidate layout fits a page.

    index : position of the layout in the list given to ``identify_form``
    name : the layout's name
    fits : the page meets every check for this layout
    reason : why it does not fit ("" when it fits)
    marks_found, marks_total : registration marks used / in the layout
    residual_mm : RMS of the fitted marks, mm (None when the page did not register)
    turn_deg : the quarter turn registration undid (None when it did not register)
    lines : share of the printed lines found, in [0, 1] (None: not registered, or no fields)
    header : match with the header fingerprint, in [0, 1] (None: no fingerprint or not registered)
    header_ink : ink share of the header region (None: no header region or not registered)
    """
    index: int
    name: str
    fits: bool
    reason: str
    marks_found: int = 0
    marks_total: int = 0
    residual_mm: float | None = None
    turn_deg: int | None = None
    lines: float | None = None
    header: float | None = None
    header_ink: float | None = None


@dataclass(frozen=True, eq=False)
class Identification:
    """Which form a page is.

    status : "identified" (``index`` and ``registration`` say which layout and where), "unknown" (no
        candidate fits) or "ambiguous" (several fit and nothing tells them apart)
    index : the chosen layout's position in the candidate list (None unless identified)
    registration : the page registered to that layout (None unless identified); ``image`` is upright
    reason : one line: what was decided and why (names the best candidate when none was chosen)
    best : position of the best candidate (the chosen one; for "unknown" the one that came closest;
        for "ambiguous" the first of those that fit); None when there were no candidates
    residual_mm : that candidate's mark residual, mm (None when it did not register)
    evidence : one ``Evidence`` per candidate, in candidate order
    """
    status: str
    index: int | None
    registration: Registration | None
    reason: str
    best: int | None
    residual_mm: float | None
    evidence: tuple[Evidence, ...]

    @property
    def identified(self) -> bool:
        return self.status == "identified"


# -------------------------------------------------------------------------------------- printed lines

def _line_samples(layout: Layout, step: float) -> tuple[np.ndarray, np.ndarray]:
    """Points along every printed line of the layout's fields (borders and cell dividers) and the unit
    normal at each: two ndarrays of shape (N, 2), float64, mm."""
    pts, normals = [], []

    def run(x0, y0, x1, y1):
        length = math.hypot(x1 - x0, y1 - y0)
        n = max(2, int(length / step) + 1)
        t = np.linspace(0.0, 1.0, n)[:, None]
        pts.append(np.hstack([x0 + t * (x1 - x0), y0 + t * (y1 - y0)]))
        nx, ny = (0.0, 1.0) if abs(y1 - y0) < abs(x1 - x0) else (1.0, 0.0)
        normals.append(np.tile([nx, ny], (n, 1)))

    for f in layout.fields:
        run(f.x, f.y, f.x + f.w, f.y)
        run(f.x, f.y + f.h, f.x + f.w, f.y + f.h)
        run(f.x, f.y, f.x, f.y + f.h)
        run(f.x + f.w, f.y, f.x + f.w, f.y + f.h)
        for c in f.cell_regions()[1:]:
            run(c.x, f.y, c.x, f.y + f.h)
    if not pts:
        return np.zeros((0, 2)), np.zeros((0, 2))
    return np.vstack(pts), np.vstack(normals)


def line_share(ink: InkMap, matrix: np.ndarray, layout: Layout, *,
               step_mm: float = LINE_STEP_MM, reach_mm: float = LINE_REACH_MM) -> float | None:
    """Share of the layout's printed lines (field borders, cell dividers) that have ink where the
    registration puts them.

    Parameters
    ----------
    ink : the ink map of the registered page (``InkMap.of(Registration.image, Registration.scale)``)
    matrix : ndarray of shape (2, 3), float64, layout mm -> continuous pixels of that image
    layout : the candidate layout
    step_mm : distance between samples along a line
    reach_mm : a sample is found when ink lies within this distance across the line

    Returns
    -------
    float in [0, 1], or None when the layout has no fields (no printed lines to look for).
    """
    pts, normals = _line_samples(layout, step_mm)
    if len(pts) == 0:
        return None
    m = np.asarray(matrix, dtype=np.float64)
    scale = math.sqrt(abs(np.linalg.det(m[:, :2])))
    k = max(1, int(math.ceil(reach_mm * scale)))
    offsets = np.linspace(-reach_mm, reach_mm, 2 * k + 1)
    across = pts[:, None, :] + offsets[None, :, None] * normals[:, None, :]      # (N, 2k + 1, 2) mm
    found = ink.at(apply_affine(m, across.reshape(-1, 2)))
    return float(found.reshape(len(pts), -1).any(axis=1).mean())


# ------------------------------------------------------------------------------------------- decision

def _judge(i: int, layout: Layout, reg: Registration, ink: InkMap) -> Evidence:
    """The evidence of one registered candidate, and whether it fits."""
    lines = line_share(ink, reg.matrix, layout)
    header = header_ink = None
    if layout.header is not None:
        header_ink, header = compare_header(ink, reg.matrix, layout.header, layout.header_fingerprint)
    why = []
    if reg.residual_mm > MAX_RESIDUAL_MM:
        why.append(f"marks off by {reg.residual_mm:.2f} mm (at most {MAX_RESIDUAL_MM:g} mm)")
    if lines is not None and lines < MIN_LINES:
        why.append(f"printed lines not where the layout has them ({lines:.0%} found, {MIN_LINES:.0%} needed)")
    if header is not None and header < MIN_HEADER:
        why.append(f"header does not match its fingerprint ({header:.2f}, {MIN_HEADER:g} needed)")
    elif header is None and header_ink is not None and header_ink < MIN_HEADER_INK:
        why.append("header region holds no print")
    return Evidence(i, layout.name, not why, "; ".join(why), reg.marks_found, len(layout.marks),
                    float(reg.residual_mm), int(reg.turn_deg), lines, header, header_ink)


def _tells(a: Evidence, b: Evidence) -> bool:
    """True when evidence both candidates have says ``a`` fits the page clearly better than ``b``."""
    if a.lines is not None and b.lines is not None and a.lines - b.lines >= TELL_LINES:
        return True
    return a.header is not None and b.header is not None and a.header - b.header >= TELL_HEADER


def _closeness(e: Evidence) -> tuple:
    """Order for 'the candidate that came closest' (larger is closer)."""
    if e.residual_mm is None:
        return (0, e.marks_found, 0.0)
    got = [v for v in (e.lines, e.header) if v is not None]
    return (1, min(got) if got else 1.0, -e.residual_mm)


def _fmt(e: Evidence) -> str:
    parts = []
    if e.lines is not None:
        parts.append(f"lines {e.lines:.0%}")
    if e.header is not None:
        parts.append(f"header {e.header:.2f}")
    return f"{e.name!r} ({', '.join(parts) or 'marks only'})"


def identify_form(page: Page, layouts) -> Identification:
    """Which of ``layouts`` the page is a form of, with the evidence for every candidate.

    Parameters
    ----------
    page : Page
        ``gray`` (H, W) uint8 (0 = ink), ``dpi``, ``source``, ``page_number``; any quarter turn.
    layouts : sequence of Layout
        The candidate forms (at least one). Give the same layout twice and the answer is "ambiguous".

    Returns
    -------
    Identification
        ``status`` "identified" with ``index`` and ``registration`` (read the page with
        ``layouts[index]`` and that registration), or "unknown" / "ambiguous" with ``reason``; a page is
        never assigned to a layout it does not fit.

    Raises
    ------
    RegistrationError
        Only for a page that is not an image at all ((H, W) uint8 with a positive dpi); a page that fits
        no layout is an answer ("unknown"), not an error.
    """
    layouts = list(layouts)
    check_param(len(layouts) > 0 and all(isinstance(x, Layout) for x in layouts), "layouts",
                "a non-empty sequence of Layout", f"{len(layouts)} items")
    where = f"{page.source} page {page.page_number}"
    gray = np.asarray(page.gray)
    if gray.ndim != 2 or gray.dtype != np.uint8:
        raise RegistrationError(f"{where}: page image must be (H, W) uint8; got {gray.shape} {gray.dtype}")
    if not (page.dpi > 0 and math.isfinite(page.dpi)):
        raise RegistrationError(f"{where}: page resolution must be a positive number; got {page.dpi!r}")
    cache: dict = {}
    inks: dict = {}         # ink map per upright image (one per quarter turn and resolution)
    evidence: list[Evidence] = []
    regs: dict[int, Registration] = {}
    for i, layout in enumerate(layouts):
        try:
            reg = register_page(page, layout, cache=cache)
        except RegistrationError as e:
            msg = str(e)
            msg = msg[len(where) + 2:] if msg.startswith(where + ": ") else msg
            evidence.append(Evidence(i, layout.name, False, msg, 0, len(layout.marks)))
            continue
        key = (reg.turn_deg, reg.image.shape, reg.dpi)
        if key not in inks:
            inks[key] = InkMap.of(reg.image, reg.dpi / 25.4)
        evidence.append(_judge(i, layout, reg, inks[key]))
        regs[i] = reg
    log.debug("%s: %s", where, evidence)
    fits = [e for e in evidence if e.fits]
    ev = tuple(evidence)
    if not fits:
        best = max(evidence, key=_closeness)
        return Identification("unknown", None, None, f"no known form: closest is {best.name!r}"
                              + (f" (residual {best.residual_mm:.2f} mm)" if best.residual_mm is not None else "")
                              + f": {best.reason}", best.index, best.residual_mm, ev)
    winners = [a for a in fits if all(_tells(a, b) for b in fits if b is not a)
               and not any(_tells(b, a) for b in fits if b is not a)]
    if len(winners) == 1:
        a = winners[0]
        rest = [b for b in fits if b is not a]
        why = f"fits {_fmt(a)}" + (f", told apart from {', '.join(_fmt(b) for b in rest)}" if rest else "")
        near = [e for e in evidence if not e.fits and e.residual_mm is not None]
        if near:
            nearest = max(near, key=_closeness)
            why += f"; next closest {nearest.name!r}: {nearest.reason}"
        return Identification("identified", a.index, regs[a.index], why, a.index, a.residual_mm, ev)
    return Identification("ambiguous", None, None,
                          f"fits {' and '.join(_fmt(e) for e in fits)} about equally; nothing tells them apart",
                          fits[0].index, fits[0].residual_mm, ev)
