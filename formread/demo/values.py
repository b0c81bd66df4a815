"""What the invented plot holders write on their cards: realistic values and a few mistakes."""

from __future__ import annotations

import datetime as dt

import numpy as np

from ..form.checkdigits import luhn_compute

__all__ = ["card_values", "MISTAKE_KINDS"]

MISTAKE_KINDS = ("luhn:member_number", "relation:litres_used")
"""Writer mistakes the demo makes on purpose: a wrong Luhn check digit in the member
number, or litres used that do not match the two meter readings."""


def card_values(rng: np.random.Generator, *, mistake: str | None = None,
                litres_empty: bool = False) -> dict[str, str]:
    """The digits one plot holder writes on one card.

    Parameters
    ----------
    rng : numpy.random.Generator
    mistake : one of ``MISTAKE_KINDS`` or None
        A deliberate writer mistake that breaks one rule of the layout.
    litres_empty : bool
        Leave the optional ``litres_used`` field empty (ignored with a litres mistake).

    Returns
    -------
    dict of field name -> the string written ("" for an empty field); boxed fields zero-padded.
    """
    plot = int(rng.integers(1, 241))
    payload = "".join(str(d) for d in rng.integers(0, 10, size=7))
    check = int(luhn_compute(payload))
    if mistake == "luhn:member_number":
        check = (check + int(rng.integers(1, 10))) % 10
    day = dt.date(2026, 1, 1) + dt.timedelta(days=int(rng.integers(0, 365)))
    used = int(min(rng.gamma(2.0, 2500.0), 60000)) if rng.random() > 0.04 else 0
    previous = int(rng.integers(0, 999999 - used + 1))
    current = previous + used
    written = used
    if mistake == "relation:litres_used":
        # a slip of the pen: one digit off, or the subtraction done wrong by a round amount
        delta = int(rng.choice([1, 10, 100, 1000])) * int(rng.choice([-1, 1]))
        written = used + delta if used + delta >= 0 else used - delta
        litres_empty = False
    return {
        "plot_number": str(plot),
        "member_number": payload + str(check),
        "reading_date": day.strftime("%d%m%Y"),
        "previous_reading": f"{previous:06d}",
        "current_reading": f"{current:06d}",
        "litres_used": "" if litres_empty else str(written),
    }
