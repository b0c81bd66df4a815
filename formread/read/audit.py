"""Audit sampling: a seeded random share of the fields that would have been accepted goes to review.

Why: the error among accepted fields is the one figure an office must know, and nobody sees it,
because accepted fields are never checked.  A clerk's verdict on a random sample of them is an
unbiased sample of that error (the fields sent to review for doubt are, by construction, the
doubtful ones and say nothing about it).  ``formread report`` turns the audited fields into an
estimate with a one-sided Clopper-Pearson upper bound.

The draw for a field depends only on the page's content hash, the field's name and the seed:
reading a batch again (resume) or in another order picks the same fields, and no page's draw
depends on another's.
"""

from __future__ import annotations

import hashlib

from .decode import ACCEPTED, AUDIT, REVIEW

__all__ = ["audit_draw", "apply_audit"]


def audit_draw(content_hash: str, field: str, seed: int = 0) -> float:
    """A number in [0, 1), uniform over fields, fixed by (page content, field name, seed)."""
    h = hashlib.sha256(f"formread-audit:{seed}:{content_hash}:{field}".encode()).digest()
    return int.from_bytes(h[:8], "big") / 2.0 ** 64


def apply_audit(readings: dict, rate: float, content_hash: str, seed: int = 0) -> set[str]:
    """Send the drawn share ``rate`` of the accepted readings to review as spot checks (in place).

    Parameters
    ----------
    readings : dict of field name to FieldReading (from decode_page)
    rate : float in [0, 1)
    content_hash : the page's content hash (formread.ledger.store.page_hash)

    Returns
    -------
    set of str : the names of the fields sent as spot checks
    """
    out = set()
    for name, r in readings.items():
        if r.decision == ACCEPTED and rate > 0 and audit_draw(content_hash, name, seed) < rate:
            r.decision, r.reason = REVIEW, AUDIT
            out.add(name)
    return out
