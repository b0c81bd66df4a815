"""Plain words for the clerk: why a field was flagged, what its status means.

Kept apart from the ledger queries so that the wording can change without touching what is
stored.  Check-digit rules are named from the form contract's own scheme table
(:data:`formread.form.checkdigits.SCHEMES`), so a scheme added there is worded here too.
"""

from __future__ import annotations

from ..form.checkdigits import SCHEMES

__all__ = ["STATUS_WORDS", "explain_reason", "rule_words"]

STATUS_WORDS = {
    "auto": "read by machine",
    "confirmed": "proposal kept",
    "corrected": "corrected",
    "unreadable": "cannot be read",
    "empty": "blank on paper",
    None: "waiting",
}
"""Plain words for a field's final status, as the page shows them."""

_RULE_WORDS = {
    "length": "it has a number of digits this field does not allow",
    "range": "its value is outside the range this field allows",
    "date": "it is not a real calendar date",
    "years": "its year is outside the years this field allows",
    "required": "the field must be filled but looks blank",
    "relation": "the numbers on this page do not add up (a rule linking fields fails)",
}


def rule_words(rule: str) -> str:
    """What breaking ``rule`` (a rule name from formread.form.rules) means, in plain words."""
    if rule in _RULE_WORDS:
        return _RULE_WORDS[rule]
    if rule in SCHEMES:
        return "the check digit does not match the other digits"
    return f"the rule '{rule}' does not hold"


def explain_reason(reason: str | None, *, confidence: float | None = None,
                   threshold: float | None = None, relations: list[str] | None = None) -> list[str]:
    """Why a field was flagged, in plain words (one sentence per reason; ``;`` separates reasons).

    ``relations``: the cross-field rules naming this field, quoted when ``relation`` failed.
    """
    if not reason:
        return []
    out = []
    for part in (p.strip() for p in reason.split(";")):
        if not part:
            continue
        if part == "low_confidence":
            s = "The reader was not sure of this reading"
            if confidence is not None and threshold is not None:
                s += f": {confidence:.0%} sure, {threshold:.0%} needed"
            out.append(s + ".")
        elif part.startswith("rule_failed:"):
            rule = part.split(":", 1)[1]
            if rule == "relation" and relations:
                out.append("A rule failed (relation): the numbers on this page do not add up: "
                           + "; ".join(relations) + ".")
            elif rule in _RULE_WORDS or rule in SCHEMES:
                out.append(f"A rule failed ({rule}): {rule_words(rule)}.")
            elif any(op in rule for op in "=<>"):
                out.append(f"A cross-field rule does not hold: {rule}.")
            else:
                out.append(f"The rule '{rule}' failed for this reading.")
        elif part.startswith("best_breaks_rule:"):
            rule = part.split(":", 1)[1]
            out.append(f"What the reader saw best breaks a rule ({rule}: {rule_words(rule)}); the value proposed "
                       "keeps the rule but is only a weaker reading. Check whether the writer made a mistake.")
        elif part == "audit":
            out.append("Spot check: the reader would have accepted this field. A few accepted fields are checked "
                       "at random so the office knows how often accepted values are wrong.")
        elif part == "segmentation_doubtful":
            out.append("The digits could not be told apart cleanly (touching, broken or stray marks).")
        elif part == "page_not_registered":
            out.append("The page could not be matched to the form layout: read the value from the page view.")
        elif part == "missing":
            out.append("Nothing was found here, but the field must be filled.")
        elif part == "blank_beside_missing":
            out.append("Nothing was found here, and fields that must be filled are blank on this page too: "
                       "the ink may be too faint for the scan. Check the paper.")
        else:
            out.append(f"Flagged: {part}.")
    return out
