"""Writer and scanner populations of the demo sets: ``make_demo(..., style=NAME)``.

A style is a population of writers (how big, slanted, dark and with which pen they write)
and a population of scanners (resolution, blur, bilevel threshold, JPEG quality).  Every
value below is drawn per writer (one writer fills one form) or per page, uniformly in the
range given unless said otherwise.  ``demo`` is the shipped demo set's population; the
others change one thing each against it, so a figure measured on a style says what that
one thing costs; ``mixed`` draws every page's writer and every file's scanner from all of
them.

Writers (drawn once per writer, who fills one form):

* boxed size: ink height as a share of the cell height; open size: share of the field height;
* slant: horizontal shear, > 0 leans the tops of the digits right;
* ink: grey level of the pen (0 = black), varying +-8 from digit to digit;
* pen: the stroke.  The demo keeps the soft MNIST profile cut at 0.22-0.45, which is bold (about
  0.9 mm measured on the scans); a round pen of a given width redraws the digit's centre line.

=========  =========  =========  ==============================  ======  ============================
style      boxed      open       slant                           ink     pen
=========  =========  =========  ==============================  ======  ============================
demo       0.68-0.82  0.52-0.68  normal, mean 0.08, sd 0.12      10-75   MNIST profile
hairline   as demo    as demo    as demo                         10-75   0.12-0.25 mm
ballpoint  as demo    as demo    as demo                         10-75   0.3-0.5 mm
felt-tip   as demo    as demo    as demo                         10-75   1.2-1.8 mm
slanted    as demo    as demo    0.28-0.50, left or right 50/50  10-75   MNIST profile
small      0.42-0.55  0.34-0.45  as demo                         10-75   MNIST profile
large      0.88-0.98  0.76-0.86  as demo                         10-75   MNIST profile, boxed digits
                                                                         up to 0.98 of a cell wide
grey-pen   as demo    as demo    as demo                         95-140  MNIST profile
blotchy    as demo    as demo    as demo                         10-75   0.35-0.7 mm, blotch 0.5-1
=========  =========  =========  ==============================  ======  ============================

Blotch ``b``: the ink density along the stroke follows a smooth random field down to
``1 - 0.75 b`` of full, and with chance ``b`` a digit gets one or two round blots of 1.2-2.2
pen widths.

Scanners (drawn per file, or per page where said; blur: Gaussian sigma in pixels at 200 dpi,
scaled with the resolution):

=========  ==============  =======  ==========================================================
style      resolution      blur     files
=========  ==============  =======  ==========================================================
demo       200, about 15%  0.35-0.9 the demo's mix: one 3-page and some single-page bilevel
           of files 300             Group 4 TIFFs (fixed threshold 150), a 2-page PDF, a few
                                    grey PNGs, the rest grey JPEGs of quality 70-90
blurry     200             1.3-2.2  the demo's mix
bilevel    200 or 300      0.35-0.9 every file a bilevel Group 4 TIFF, threshold 95-200 per
                                    page (low: thin, broken strokes; high: fat strokes and
                                    dark lighting ramps)
jpeg-low   200 or 300      0.35-0.9 every page a grey JPEG of quality 10-30 (single pages as
                                    .jpg, the 2- and 3-page files as PDFs of such pages)
=========  ==============  =======  ==========================================================

One page of every set is scanned upside down.  The writer styles scan with the ``demo``
scanners and the scanner styles write with the ``demo`` writers; ``mixed`` draws each page's
writer from all nine writer populations and each file's scanner from all four scanner
populations (equal chances).  Everything not listed (position in the box, sloppiness,
touching neighbours, paper, lighting, skew, noise, dust) is drawn as in the demo.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .fill import Writer, random_writer

__all__ = ["STYLES", "WRITER_STYLES", "SCANNER_STYLES", "WriterPopulation", "ScannerPopulation",
           "WRITERS", "SCANNERS", "draw_writer", "style_populations"]


@dataclass(frozen=True)
class WriterPopulation:
    """Ranges of one writer population (see the module docstring); ``None`` = as in the demo."""

    name: str
    size: tuple[float, float] | None = None
    size_open: tuple[float, float] | None = None
    slant: tuple[float, float] | None = None      # |shear| range, sign drawn 50/50
    ink: tuple[float, float] | None = None
    pen_mm: tuple[float, float] | None = None
    blotch: tuple[float, float] | None = None
    max_width: float | None = None


@dataclass(frozen=True)
class ScannerPopulation:
    """Ranges of one scanner population (see the module docstring)."""

    name: str
    blur: tuple[float, float] = (0.35, 0.9)       # sigma at 200 dpi
    formats: str = "demo"                          # "demo" mix | "tiff" (all bilevel) | "jpeg" (all JPEG)
    dpis: tuple[int, ...] | None = None            # None: the demo's choice per file
    bilevel_threshold: tuple[float, float] | None = None   # None: the demo's fixed 150
    jpeg_quality: tuple[int, int] | None = None    # None: the demo's 70-90 (inclusive)


WRITERS = {
    "demo": WriterPopulation("demo"),
    "hairline": WriterPopulation("hairline", pen_mm=(0.12, 0.25)),
    "ballpoint": WriterPopulation("ballpoint", pen_mm=(0.3, 0.5)),
    "felt-tip": WriterPopulation("felt-tip", pen_mm=(1.2, 1.8)),
    "slanted": WriterPopulation("slanted", slant=(0.28, 0.50)),
    "small": WriterPopulation("small", size=(0.42, 0.55), size_open=(0.34, 0.45)),
    "large": WriterPopulation("large", size=(0.88, 0.98), size_open=(0.76, 0.86), max_width=0.98),
    "grey-pen": WriterPopulation("grey-pen", ink=(95.0, 140.0)),
    "blotchy": WriterPopulation("blotchy", pen_mm=(0.35, 0.7), blotch=(0.5, 1.0)),
}
"""Writer populations by name."""

SCANNERS = {
    "demo": ScannerPopulation("demo"),
    "blurry": ScannerPopulation("blurry", blur=(1.3, 2.2), dpis=(200,)),
    "bilevel": ScannerPopulation("bilevel", formats="tiff", dpis=(200, 300), bilevel_threshold=(95.0, 200.0)),
    "jpeg-low": ScannerPopulation("jpeg-low", formats="jpeg", dpis=(200, 300), jpeg_quality=(10, 30)),
}
"""Scanner populations by name."""

WRITER_STYLES = tuple(k for k in WRITERS if k != "demo")
SCANNER_STYLES = tuple(k for k in SCANNERS if k != "demo")
STYLES = ("demo",) + WRITER_STYLES + SCANNER_STYLES + ("mixed",)
"""Every style name ``make_demo`` and ``formread demo make --style`` accept."""


def style_populations(style: str) -> tuple[list[str], list[str]]:
    """The writer and scanner populations a style draws from (one each, or all for ``mixed``)."""
    if style == "mixed":
        return list(WRITERS), list(SCANNERS)
    if style in WRITERS:
        return [style], ["demo"]
    return ["demo"], [style]


def draw_writer(pop: WriterPopulation, rng: np.random.Generator) -> Writer:
    """One writer of population ``pop``: the demo's writer with the population's ranges applied.

    The demo population is exactly :func:`formread.demo.fill.random_writer`; the others draw
    it first and then their own values, so each changes only what its name says.
    """
    w = random_writer(rng)
    if pop.name == "demo":
        return w
    if pop.size is not None:
        w.size = float(rng.uniform(*pop.size))
    if pop.size_open is not None:
        w.size_open = float(rng.uniform(*pop.size_open))
    if pop.slant is not None:
        w.slant = float(rng.choice([-1.0, 1.0]) * rng.uniform(*pop.slant))
    if pop.ink is not None:
        w.ink = float(rng.uniform(*pop.ink))
        w.ink_limit = max(w.ink_limit, pop.ink[1] + 20.0)
    if pop.pen_mm is not None:
        w.pen_mm = float(rng.uniform(*pop.pen_mm))
    if pop.blotch is not None:
        w.blotch = float(rng.uniform(*pop.blotch))
    if pop.max_width is not None:
        w.max_width = pop.max_width
    return w
