"""Test-time augmentation, measured: does averaging a few fixed views of each digit pay?

Reads each digit image as it is and as a few deterministic variants (one-pixel shifts, small
rotations, a thicker stroke), averages the bundle's calibrated probabilities over the views, and
prints per set of views: accuracy, ECE (15 bins), negative log-likelihood, and the network's time
per digit image (one core), with the time a demo page would take (its distinct digit images times
the views).  Measured on the held-out parts (the MNIST sample's test part, the second half of
scikit-learn's digits; never trained on by any shipped model) and on digits cut from rendered,
scanned development forms (every style mixed, development seed 106: MNIST test-part handwriting,
fields cut to their written length, as ``benchmarks/cut_vs_clean.py`` takes them).

    python benchmarks/test_time_views.py [--model FILE] [--pages 60] [--seed 106] [--keep DIR] [--json]
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from scipy import ndimage

DIGITS_PER_PAGE = 52
"""Distinct digit images the network reads on a demo page (1,560 over 30 demo pages, seed 3)."""


def _shift(x: np.ndarray, dy: int, dx: int) -> np.ndarray:
    out = np.zeros_like(x)
    h, w = x.shape[-2:]
    out[..., max(0, dy):h + min(0, dy), max(0, dx):w + min(0, dx)] = \
        x[..., max(0, -dy):h + min(0, -dy), max(0, -dx):w + min(0, -dx)]
    return out


def _rotate(x: np.ndarray, deg: float) -> np.ndarray:
    return np.clip(ndimage.rotate(x, deg, axes=(-1, -2), reshape=False, order=1, mode="constant"), 0, 1)


def _thicker(x: np.ndarray) -> np.ndarray:
    cross = np.zeros((1, 1, 3, 3), bool)
    cross[0, 0, 1, :] = cross[0, 0, :, 1] = True
    return ndimage.grey_dilation(x, footprint=cross)


_SHIFTS = [lambda x, d=d: _shift(x, *d) for d in ((0, 1), (0, -1), (1, 0), (-1, 0))]
_ROTATIONS = [lambda x: _rotate(x, 6.0), lambda x: _rotate(x, -6.0)]
VIEWS = {
    "one view (shipped)": [lambda x: x],
    "5: shifts by one pixel": [lambda x: x] + _SHIFTS,
    "3: rotations of 6 degrees": [lambda x: x] + _ROTATIONS,
    "2: a thicker stroke": [lambda x: x, _thicker],
    "8: all of them": [lambda x: x] + _SHIFTS + _ROTATIONS + [_thicker],
}
"""Sets of views; each function maps (N, 1, 28, 28) float32 in [0, 1] to the same shape."""


def _cut_digits(folder: Path, out: Path, model, pages: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Digits cut from development forms, (N, 1, 28, 28) float32, and their MNIST labels (N,): the
    pages and digits ``benchmarks/cut_vs_clean.py`` takes, both field kinds."""
    from cut_vs_clean import cut_digits, make_pages  # this script's own folder is on sys.path

    from formread.learn.datasets import mnist_raw

    got, _ = cut_digits(folder, out, model, make_pages(folder, "mixed", pages, seed),
                        command="benchmarks/test_time_views.py")
    _, labels = mnist_raw()
    x = np.concatenate([g["cut"] for g in got.values()]).astype(np.float32)
    return x, labels[np.concatenate([g["mnist"] for g in got.values()])].astype(np.int64)


def _measure(bundle, x: np.ndarray, y: np.ndarray) -> dict:
    from formread.nn.metrics import expected_calibration_error, nll

    out = {}
    for name, views in VIEWS.items():
        probs = np.zeros((len(x), 10), np.float64)
        seconds = 0.0
        for view in views:
            xv = np.ascontiguousarray(view(x), dtype=np.float32)
            t0 = time.perf_counter()
            probs += bundle.predict_proba(xv)
            seconds += time.perf_counter() - t0
        probs /= len(views)
        ms_per_digit = 1000.0 * seconds / max(1, len(x))
        out[name] = {"accuracy": round(float((probs.argmax(1) == y).mean()), 4),
                     "ece": round(float(expected_calibration_error(probs, y)), 4),
                     "nll": round(float(nll(probs, y)), 4),
                     "ms_per_1000_digits": round(1000 * ms_per_digit, 1),
                     "network_ms_per_page": round(DIGITS_PER_PAGE * ms_per_digit, 1)}
    return out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--model", type=Path, default=None, help="model file (default: the shipped one)")
    ap.add_argument("--pages", type=int, default=60, help="development pages to cut digits from")
    ap.add_argument("--seed", type=int, default=106, help="development seed of those pages")
    ap.add_argument("--keep", type=Path, default=None, help="folder for the pages, reused when made alike")
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args(argv)

    from threadpoolctl import threadpool_limits

    from formread.learn.datasets import load_dataset
    from formread.read.bundle import load_bundle
    from formread.store import shipped_model

    model = args.model or shipped_model()
    bundle = load_bundle(model)
    res: dict = {"model": str(model), "sets": {}}
    with tempfile.TemporaryDirectory(prefix="formread-tta-") as tmp:
        folder = args.keep or Path(tmp) / "pages"
        folder.mkdir(parents=True, exist_ok=True)
        cut = _cut_digits(folder, Path(tmp) / "out", model, args.pages, args.seed)
    sets = {"mnist:test": load_dataset("mnist", "test"), "digits:test": load_dataset("digits", "test")}
    with threadpool_limits(1):
        for name, ds in sets.items():
            res["sets"][name] = {"images": int(len(ds.y)), **_measure(bundle, ds.x, ds.y)}
        res["sets"][f"cut, mixed styles seed {args.seed}"] = {"images": int(len(cut[1])), **_measure(bundle, *cut)}
    if args.json:
        print(json.dumps(res))
        return 0
    print(f"test-time views, {res['model']}; network time on one core, a demo page = {DIGITS_PER_PAGE} digit images")
    for sname, r in res["sets"].items():
        print(f"\n{sname} ({r['images']} images)")
        print(f"  {'views':<28} {'accuracy':>9} {'ECE':>7} {'NLL':>7} {'ms/page':>8}")
        for vname in VIEWS:
            v = r[vname]
            print(f"  {vname:<28} {v['accuracy']:>9.4f} {v['ece']:>7.4f} {v['nll']:>7.4f} "
                  f"{v['network_ms_per_page']:>8.1f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
