"""Check-digit schemes used on forms: compute a check character, validate a full string.

Every ``*_compute(payload)`` takes the digits without their check character and
returns the check character as a string; every ``*_valid(value)`` takes the full
string, check character included, and returns a bool (never raises on odd input:
a string with characters the scheme does not allow is simply invalid).

Schemes
-------
- Luhn (ISO/IEC 7812-1, annex B): payment card numbers, many member numbers.
- ISO 7064 MOD 11-2: one check character 0-9 or ``X`` (ISNI, ORCID, Chinese ID numbers).
- ISO 7064 MOD 97-10: two check digits at the end; the whole number mod 97 is 1.
  IBAN (ISO 13616) uses it after moving the first four characters to the end and
  mapping letters A=10 .. Z=35 (:func:`iban_valid`).
- GS1 mod 10: weights 3, 1, 3, ... from the right (GTIN, GLN, SSCC).
- Verhoeff (1969) and Damm (2004): detect every single substitution and every
  adjacent transposition.

The field rule ``check = "mod97-10"`` means the plain ISO 7064 form (check digits at
the end), because a form field holds digits only.
"""

from __future__ import annotations

from ..errors import ParameterError

__all__ = [
    "luhn_compute", "luhn_valid", "mod11_2_compute", "mod11_2_valid",
    "mod97_10_compute", "mod97_10_valid", "iban_valid", "gs1_compute", "gs1_valid",
    "verhoeff_compute", "verhoeff_valid", "damm_compute", "damm_valid", "SCHEMES",
]


def _digits(s: str) -> list[int] | None:
    if not isinstance(s, str) or not s or not s.isascii() or not s.isdigit():
        return None
    return [ord(c) - 48 for c in s]


# --- Luhn -------------------------------------------------------------------------------

def _luhn_sum(ds: list[int], double_rightmost: bool) -> int:
    total = 0
    for i, d in enumerate(reversed(ds)):
        if (i % 2 == 0) == double_rightmost:
            d *= 2
            if d > 9:
                d -= 9
        total += d
    return total


def luhn_compute(payload: str) -> str:
    """Luhn check digit for ``payload`` (digits); ValueError on a non-digit payload."""
    ds = _digits(payload)
    if ds is None:
        raise ParameterError(f"Luhn payload must be digits; got {payload!r}")
    return str((10 - _luhn_sum(ds, True) % 10) % 10)


def luhn_valid(value: str) -> bool:
    """True when ``value`` (digits, check digit last, at least 2 long) passes Luhn."""
    ds = _digits(value)
    return ds is not None and len(ds) >= 2 and _luhn_sum(ds, False) % 10 == 0


# --- ISO 7064 MOD 11-2 -------------------------------------------------------------------

def mod11_2_compute(payload: str) -> str:
    """ISO 7064 MOD 11-2 check character ('0'-'9' or 'X') for ``payload`` (digits)."""
    ds = _digits(payload)
    if ds is None:
        raise ParameterError(f"MOD 11-2 payload must be digits; got {payload!r}")
    p = 0
    for d in ds:
        p = ((p + d) * 2) % 11
    c = (12 - p) % 11
    return "X" if c == 10 else str(c)


def mod11_2_valid(value: str) -> bool:
    """True when ``value`` (digits then a check character 0-9 or X/x) passes MOD 11-2."""
    if not isinstance(value, str) or len(value) < 2 or _digits(value[:-1]) is None:
        return False
    last = value[-1].upper()
    if not (last == "X" or (last.isascii() and last.isdigit())):
        return False
    return mod11_2_compute(value[:-1]) == last


# --- ISO 7064 MOD 97-10 ------------------------------------------------------------------

def mod97_10_compute(payload: str) -> str:
    """Two ISO 7064 MOD 97-10 check digits for ``payload`` (digits): 98 - (payload*100 mod 97)."""
    ds = _digits(payload)
    if ds is None:
        raise ParameterError(f"MOD 97-10 payload must be digits; got {payload!r}")
    return f"{98 - (int(payload) * 100) % 97:02d}"


def mod97_10_valid(value: str) -> bool:
    """True when ``value`` (digits, two check digits last, at least 3 long) is 1 mod 97."""
    ds = _digits(value)
    return ds is not None and len(ds) >= 3 and int(value) % 97 == 1


def iban_valid(value: str) -> bool:
    """True when ``value`` is a valid IBAN (ISO 13616): spaces ignored, letters A=10..Z=35,
    first four characters moved to the end, the number mod 97 equals 1."""
    if not isinstance(value, str):
        return False
    s = value.replace(" ", "").upper()
    if len(s) < 5 or not s.isascii() or not s.isalnum() or not s[:2].isalpha() or not s[2:4].isdigit():
        return False
    s = s[4:] + s[:4]
    num = "".join(str(ord(c) - 55) if c.isalpha() else c for c in s)
    return int(num) % 97 == 1


# --- GS1 mod 10 --------------------------------------------------------------------------

def _gs1_sum(ds: list[int]) -> int:
    # weight 3 on the rightmost payload digit, then 1, 3, 1, ...
    return sum(d * (3 if i % 2 == 0 else 1) for i, d in enumerate(reversed(ds)))


def gs1_compute(payload: str) -> str:
    """GS1 mod 10 check digit for ``payload`` (digits)."""
    ds = _digits(payload)
    if ds is None:
        raise ParameterError(f"GS1 payload must be digits; got {payload!r}")
    return str((10 - _gs1_sum(ds) % 10) % 10)


def gs1_valid(value: str) -> bool:
    """True when ``value`` (digits, check digit last, at least 2 long) passes GS1 mod 10."""
    ds = _digits(value)
    return ds is not None and len(ds) >= 2 and gs1_compute(value[:-1]) == value[-1]


# --- Verhoeff ----------------------------------------------------------------------------

_VD = (  # multiplication table of the dihedral group D5
    (0, 1, 2, 3, 4, 5, 6, 7, 8, 9), (1, 2, 3, 4, 0, 6, 7, 8, 9, 5), (2, 3, 4, 0, 1, 7, 8, 9, 5, 6),
    (3, 4, 0, 1, 2, 8, 9, 5, 6, 7), (4, 0, 1, 2, 3, 9, 5, 6, 7, 8), (5, 9, 8, 7, 6, 0, 4, 3, 2, 1),
    (6, 5, 9, 8, 7, 1, 0, 4, 3, 2), (7, 6, 5, 9, 8, 2, 1, 0, 4, 3), (8, 7, 6, 5, 9, 3, 2, 1, 0, 4),
    (9, 8, 7, 6, 5, 4, 3, 2, 1, 0),
)
_VP = (  # position permutations
    (0, 1, 2, 3, 4, 5, 6, 7, 8, 9), (1, 5, 7, 6, 2, 8, 3, 0, 9, 4), (5, 8, 0, 3, 7, 9, 6, 1, 4, 2),
    (8, 9, 1, 6, 0, 4, 3, 5, 2, 7), (9, 4, 5, 3, 1, 2, 6, 8, 7, 0), (4, 2, 8, 6, 5, 7, 3, 9, 0, 1),
    (2, 7, 9, 3, 8, 0, 6, 4, 1, 5), (7, 0, 4, 6, 9, 1, 3, 2, 5, 8),
)
_VINV = (0, 4, 3, 2, 1, 5, 6, 7, 8, 9)


def _verhoeff_state(ds: list[int], offset: int) -> int:
    c = 0
    for i, d in enumerate(reversed(ds)):
        c = _VD[c][_VP[(i + offset) % 8][d]]
    return c


def verhoeff_compute(payload: str) -> str:
    """Verhoeff check digit for ``payload`` (digits)."""
    ds = _digits(payload)
    if ds is None:
        raise ParameterError(f"Verhoeff payload must be digits; got {payload!r}")
    return str(_VINV[_verhoeff_state(ds, 1)])


def verhoeff_valid(value: str) -> bool:
    """True when ``value`` (digits, check digit last, at least 2 long) passes Verhoeff."""
    ds = _digits(value)
    return ds is not None and len(ds) >= 2 and _verhoeff_state(ds, 0) == 0


# --- Damm --------------------------------------------------------------------------------

_DAMM = (  # a totally anti-symmetric quasigroup of order 10 (Damm 2004)
    (0, 3, 1, 7, 5, 9, 8, 6, 4, 2), (7, 0, 9, 2, 1, 5, 4, 8, 6, 3), (4, 2, 0, 6, 8, 7, 1, 3, 5, 9),
    (1, 7, 5, 0, 9, 8, 3, 4, 2, 6), (6, 1, 2, 3, 0, 4, 5, 9, 7, 8), (3, 6, 7, 4, 2, 0, 9, 5, 8, 1),
    (5, 8, 6, 9, 7, 2, 0, 1, 3, 4), (8, 9, 4, 5, 3, 6, 2, 0, 1, 7), (9, 4, 3, 8, 6, 1, 7, 2, 0, 5),
    (2, 5, 8, 1, 4, 3, 6, 7, 9, 0),
)


def _damm_state(ds: list[int]) -> int:
    c = 0
    for d in ds:
        c = _DAMM[c][d]
    return c


def damm_compute(payload: str) -> str:
    """Damm check digit for ``payload`` (digits)."""
    ds = _digits(payload)
    if ds is None:
        raise ParameterError(f"Damm payload must be digits; got {payload!r}")
    return str(_damm_state(ds))


def damm_valid(value: str) -> bool:
    """True when ``value`` (digits, check digit last, at least 2 long) passes Damm."""
    ds = _digits(value)
    return ds is not None and len(ds) >= 2 and _damm_state(ds) == 0


SCHEMES = {
    "luhn": (luhn_compute, luhn_valid),
    "mod11-2": (mod11_2_compute, mod11_2_valid),
    "mod97-10": (mod97_10_compute, mod97_10_valid),
    "gs1": (gs1_compute, gs1_valid),
    "verhoeff": (verhoeff_compute, verhoeff_valid),
    "damm": (damm_compute, damm_valid),
}
"""Name used in layout files (``check = "<name>"``) -> (compute, valid)."""
