"""Run the network on a page's segmented digits and hand the decoder its evidence.

Why batched: one ``predict_proba`` call over every digit image of every
candidate segmentation of every field of a page (or of several pages) costs far
less than one call per field, since the convolutions run as a few large matrix
products.  The model bundle applies its calibrated temperature (and averages an
ensemble), so the decoder sees calibrated digit probabilities.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np

from .decode import evidence_from_digits

__all__ = ["recognise_pages", "recognise_page", "digit_images"]


def digit_images(pages: Sequence[Mapping]) -> tuple[np.ndarray, list]:
    """Gather every candidate's digit images of the given pages into one array.

    Parameters
    ----------
    pages : sequence of ``{name: FieldDigits}``

    Returns
    -------
    x : ndarray of shape (N, 1, 28, 28), float32
        All digit images, page by page, field by field, candidate by candidate.
    spans : list (one per page) of ``{name: [(start, stop), ...]}``
        Rows of ``x`` holding each candidate's digits.
    """
    chunks, spans, n = [], [], 0
    for fields in pages:
        mine = {}
        for name, fd in fields.items():
            rows = []
            for cand in fd.candidates:
                d = np.asarray(cand.digits, dtype=np.float32).reshape(-1, 1, 28, 28)
                chunks.append(d)
                rows.append((n, n + len(d)))
                n += len(d)
            mine[name] = rows
        spans.append(mine)
    x = np.concatenate(chunks) if chunks else np.zeros((0, 1, 28, 28), np.float32)
    return x, spans


def recognise_pages(pages: Sequence[Mapping], bundle, *, batch_size: int = 256) -> list[dict]:
    """Digit probabilities for every candidate of every field of several pages, in ONE network pass.

    Parameters
    ----------
    pages : sequence of ``{name: FieldDigits}`` (``PageDigits.fields``)
    bundle : formread.read.bundle.Bundle (anything with ``predict_proba(x) -> (N, 10)``)

    Returns
    -------
    list (one per page) of ``{name: FieldEvidence}``; each candidate's ``probs`` is
    an ndarray of shape (K, 10), float32.
    """
    x, spans = digit_images(pages)
    if len(x):
        # candidates share most of their digits (about 30% of a page's images are repeats): each
        # distinct image goes through the network once
        slot: dict[bytes, int] = {}           # an image's bytes -> its row among the distinct ones
        keep: list[int] = []                  # the first row of x holding each distinct image
        which = np.empty(len(x), np.int64)    # each row of x -> its distinct image
        for i, d in enumerate(x):
            which[i] = slot.setdefault(d.tobytes(), len(keep))
            if which[i] == len(keep):
                keep.append(i)
        probs = bundle.predict_proba(x[keep], batch_size=batch_size)[which]
    else:
        probs = np.zeros((0, 10), np.float32)
    out = []
    for fields, mine in zip(pages, spans):
        out.append({name: evidence_from_digits(fd, [probs[a:b] for a, b in mine[name]])
                    for name, fd in fields.items()})
    return out


def recognise_page(fields: Mapping, bundle) -> dict:
    """``recognise_pages`` for one page: ``{name: FieldDigits}`` -> ``{name: FieldEvidence}``."""
    return recognise_pages([fields], bundle)[0]
