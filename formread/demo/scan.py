"""Scan simulation: what an office scanner does to a clean card.

Skew, shift and scale of the paper on the glass, optical blur, sensor noise, uneven
lighting (a smooth gradient and a shadow along one edge), dust, and the scanner's
bilevel mode (a fixed threshold).  A page may go in upside down.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, replace

import numpy as np
from PIL import Image
from scipy import ndimage

from .card import mm_to_px

__all__ = ["ScanSettings", "scan_matrix", "random_scan_settings", "simulate_scan", "to_bilevel"]


@dataclass(frozen=True)
class ScanSettings:
    """How one page was scanned (angles in degrees, lengths in mm)."""

    dpi: int
    skew_deg: float          # paper rotation on the glass, counter-clockwise on the image
    shift_mm: tuple[float, float]   # paper offset (x right, y down)
    scale: float             # scanner scale error (1.0 = exact)
    blur_px: float           # optical blur, Gaussian sigma in pixels
    noise: float             # sensor noise, grey levels (standard deviation)
    paper: float             # brightness of the paper, 0-255
    gradient: float          # darkening across the page by the lighting ramp, share 0-1
    gradient_dir_deg: float  # direction of the ramp
    shadow: float            # darkening at one edge (a lifted lid or a curled sheet), share 0-1
    shadow_edge: str         # "left" | "right" | "top" | "bottom"
    upside_down: bool

    def as_record(self) -> dict:
        """JSON-ready summary for the ground truth."""
        d = asdict(self)
        return {"dpi": d["dpi"], "upside_down": d["upside_down"], "skew_deg": round(d["skew_deg"], 3),
                "shift_mm": [round(v, 2) for v in d["shift_mm"]], "scale": round(d["scale"], 4)}


def scan_matrix(s: ScanSettings, shape: tuple[int, int]) -> np.ndarray:
    """The paper's placement on the glass.

    Parameters
    ----------
    s : ScanSettings (``skew_deg``, ``shift_mm``, ``scale``, ``dpi`` are used)
    shape : (H, W) of the clean card in pixels

    Returns
    -------
    ndarray of shape (2, 3), float64: clean-card pixels (x, y, 1) -> scan pixels (x, y); for an
    upside-down page the clean card is turned 180 degrees first.
    """
    h, w = shape
    cx, cy = (w - 1) / 2, (h - 1) / 2
    t = np.deg2rad(s.skew_deg)
    # counter-clockwise on screen with y down: x' = x cos + y sin, y' = -x sin + y cos
    a = s.scale * np.array([[np.cos(t), np.sin(t)], [-np.sin(t), np.cos(t)]])
    shift = np.array([mm_to_px(s.shift_mm[0], s.dpi), mm_to_px(s.shift_mm[1], s.dpi)])
    b = np.array([cx, cy]) - a @ np.array([cx, cy]) + shift
    return np.hstack([a, b[:, None]])


def random_scan_settings(rng: np.random.Generator, *, dpi: int, page_mm: tuple[float, float],
                         marks_mm: list[tuple[float, float, float]], upside_down: bool = False,
                         noise: tuple[float, float] = (0.5, 1.5), margin_mm: float = 1.5,
                         blur: tuple[float, float] = (0.35, 0.9)) -> ScanSettings:
    """Random scanner and paper placement that keeps every registration mark on the glass.

    Parameters
    ----------
    page_mm : (width, height) of the page in mm
    marks_mm : (x centre, y centre, side) of each mark in mm, x right, y down
    noise : (low, high) range of the sensor noise in grey levels; a scanner that filters its
        noise (lossless PNG output) gets (0, 0), which also keeps its files small
    margin_mm : every mark corner stays at least this far inside the scanned image
    blur : (low, high) range of the optical blur, Gaussian sigma in pixels at 200 dpi (scaled
        with ``dpi``)
    """
    w_mm, h_mm = page_mm
    shape = (round(mm_to_px(h_mm, dpi)), round(mm_to_px(w_mm, dpi)))
    corners = []
    for x, y, size in marks_mm:
        for sx in (-0.5, 0.5):
            for sy in (-0.5, 0.5):
                corners.append((x + sx * size, y + sy * size))
    if upside_down:
        corners = [(w_mm - x, h_mm - y) for x, y in corners]
    pts = np.array([[mm_to_px(x, dpi), mm_to_px(y, dpi), 1.0] for x, y in corners]).reshape(-1, 3)
    lo = mm_to_px(margin_mm, dpi)
    hi = np.array([shape[1], shape[0]]) - lo
    base = ScanSettings(           # straight and exact until the loop below moves it
        dpi=dpi,
        skew_deg=0.0,
        shift_mm=(0.0, 0.0),
        scale=1.0,
        blur_px=float(rng.uniform(*blur)) * dpi / 200,
        noise=float(rng.uniform(*noise)),
        paper=float(rng.uniform(236, 250)),
        gradient=float(rng.uniform(0.0, 0.12)),
        gradient_dir_deg=float(rng.uniform(0, 360)),
        shadow=float(rng.choice([0.0, rng.uniform(0.08, 0.3)], p=[0.6, 0.4])),
        shadow_edge=str(rng.choice(["left", "right", "top", "bottom"])),
        upside_down=upside_down,
    )
    reach = 1.0
    for attempt in range(200):
        s = replace(
            base,
            skew_deg=float(np.clip(rng.normal(0, 1.3), -3, 3)) * reach,
            shift_mm=(float(rng.uniform(-8, 8)) * reach, float(rng.uniform(-8, 8)) * reach),
            scale=float(1 + rng.uniform(-0.03, 0.03)),
        )
        out = pts @ scan_matrix(s, shape).T
        if (out >= lo).all() and (out <= hi).all():
            return s
        if attempt % 20 == 19:
            reach *= 0.8
    return base


def _lighting(s: ScanSettings, shape: tuple[int, int]) -> np.ndarray:
    """Illumination times paper brightness, shape (H, W), float32 (1 = full light on white paper)."""
    h, w = shape
    y = np.linspace(0, 1, h, dtype=np.float32)[:, None]
    x = np.linspace(0, 1, w, dtype=np.float32)[None, :]
    t = np.deg2rad(s.gradient_dir_deg)
    c, n = float(np.cos(t)), float(np.sin(t))
    lo, hi = min(c, 0) + min(n, 0), max(c, 0) + max(n, 0)   # range of c x + n y over the unit square
    k = s.gradient / max(hi - lo, 1e-6)
    # 1 - gradient * (ramp - lo) / (hi - lo), split into a column term and a row term
    col = np.float32(1 + k * lo) - np.float32(k * c) * x
    row = -np.float32(k * n) * y
    if s.shadow > 0:
        dist = {"left": x, "right": 1 - x, "top": y, "bottom": 1 - y}[s.shadow_edge]
        edge = np.float32(s.paper / 255.0) * (1 - np.float32(s.shadow) * np.exp(-dist / np.float32(0.04)))
        return ((col + row) * edge).astype(np.float32)
    return ((col + row) * np.float32(s.paper / 255.0)).astype(np.float32)


def simulate_scan(clean: np.ndarray, s: ScanSettings, rng: np.random.Generator) -> np.ndarray:
    """Scan a clean page.

    Parameters
    ----------
    clean : ndarray of shape (H, W), uint8, 0 = ink, 255 = paper; the card at ``s.dpi``
    s : ScanSettings
    rng : numpy.random.Generator (noise and dust)

    Returns
    -------
    scan : ndarray of shape (H, W), uint8, 0 = ink, 255 = paper (the scanner window is the page size)
    """
    page = clean[::-1, ::-1] if s.upside_down else clean
    m = np.vstack([scan_matrix(s, page.shape), [0, 0, 1]])
    inv = np.linalg.inv(m)[:2].ravel()
    moved = Image.fromarray(np.ascontiguousarray(page)).transform(
        (page.shape[1], page.shape[0]), Image.Transform.AFFINE, data=tuple(float(v) for v in inv),
        resample=Image.Resampling.BILINEAR, fillcolor=255)
    a = np.asarray(moved, dtype=np.float32)
    # dust: a few small dark specks on the glass
    for _ in range(int(rng.integers(0, 7))):
        r, c = int(rng.integers(0, a.shape[0] - 4)), int(rng.integers(0, a.shape[1] - 4))
        k = int(rng.integers(1, 4))
        a[r: r + k, c: c + k] = np.minimum(a[r: r + k, c: c + k], float(rng.uniform(40, 160)))
    a = ndimage.gaussian_filter(a, s.blur_px, mode="nearest")
    a *= _lighting(s, a.shape)
    if s.noise > 0:
        a += rng.standard_normal(a.shape, dtype=np.float32) * np.float32(s.noise)
    a += np.float32(0.5)
    return np.clip(a, 0, 255, out=a).astype(np.uint8)


def to_bilevel(scan: np.ndarray, threshold: int = 150) -> Image.Image:
    """The scanner's bilevel mode: a fixed threshold (grey levels ``>= threshold`` are paper).

    Parameters
    ----------
    scan : ndarray of shape (H, W), uint8, 0 = ink, 255 = paper

    Returns
    -------
    PIL image in mode "1" (white = paper)
    """
    return Image.fromarray(scan >= threshold)
