"""What the invented plot holders write on their forms: realistic values and a few mistakes."""

from __future__ import annotations

import datetime as dt

import numpy as np

from ..form.checkdigits import damm_compute, luhn_compute

__all__ = ["card_values", "MISTAKE_KINDS", "slip_values", "SLIP_MISTAKE_KINDS", "CROPS", "CRATES_RANGE"]

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


CROPS = ("crates_tomatoes", "crates_beans", "crates_courgettes", "crates_apples", "crates_potatoes")
"""The tally lines of the delivery slip, in the order of the form (and of its total relation)."""
CRATES_RANGE = (0, 150)
"""The ``range`` rule of every tally line of the slip layout."""
SLIP_MISTAKE_KINDS = ("range:crates_potatoes", "relation:total_crates", "damm:slip_number")
"""Writer mistakes on the delivery slip: a 3-digit count above the tally lines' range (an
extra digit, the total still adding up what was written), a total that does not add up,
or a wrong Damm check digit in the slip number."""


def slip_values(rng: np.random.Generator, *, mistake: str | None = None) -> dict[str, str]:
    """The digits one grower writes on one produce delivery slip.

    Parameters
    ----------
    rng : numpy.random.Generator
    mistake : one of ``SLIP_MISTAKE_KINDS`` or None
        A deliberate writer mistake that breaks one rule of the slip layout.

    Returns
    -------
    dict of field name -> the string written; boxed fields zero-padded, every field filled
    (a crop not brought is written ``"0"``).
    """
    payload = "".join(str(d) for d in rng.integers(0, 10, size=5))
    check = int(damm_compute(payload))
    if mistake == "damm:slip_number":
        check = (check + int(rng.integers(1, 10))) % 10
    day = dt.date(2026, 1, 1) + dt.timedelta(days=int(rng.integers(0, 365)))
    crates = []
    for _ in CROPS:
        u = rng.random()
        if u < 0.2:
            crates.append(0)
        elif u < 0.9:
            crates.append(int(rng.integers(1, 40)))
        else:
            crates.append(int(rng.integers(40, CRATES_RANGE[1] + 1)))
    if mistake == "range:crates_potatoes":
        # one digit too many: a 3-digit count above the range (the total adds what was written)
        crates[CROPS.index("crates_potatoes")] = int(rng.integers(CRATES_RANGE[1] + 1, 1000))
    total = sum(crates)
    if mistake == "relation:total_crates":
        delta = int(rng.choice([1, 2, 10])) * int(rng.choice([-1, 1]))
        total = total + delta if total + delta >= 0 else total - delta
    gross = int(np.clip(round(sum(crates) * rng.uniform(6.0, 14.0)), 1, 9999))
    out = {
        "slip_number": payload + str(check),
        "delivery_date": day.strftime("%d%m%y"),
        "plot_number": str(int(rng.integers(1, 241))),
    }
    out.update({name: str(n) for name, n in zip(CROPS, crates)})
    out["total_crates"] = str(total)
    out["gross_kg"] = f"{gross:04d}"
    return out
