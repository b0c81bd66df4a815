"""The one threshold policy: which acceptance threshold applies to each field, and why.

A field is accepted when its confidence reaches its threshold (and its rules hold).  The
threshold comes from the first of these that is set:

1. ``explicit``: the command line (``formread read --threshold``): wins over everything, since a
   person typing it means it for this run;
2. the field's own ``threshold`` in the layout;
3. the field's own ``target_error`` in the layout, turned into a threshold by the model bundle's
   fitted decisions (``fitted``);
4. the form's ``threshold`` (``[form] threshold``);
5. the form's ``target_error``, turned into a threshold the same way;
6. the bundle's fitted threshold for :data:`DEFAULT_TARGET` error among accepted fields;
7. :data:`DEFAULT_THRESHOLD`.

``fitted`` is a callable ``fitted(target, field_name or None) -> threshold or None`` that the
model bundle provides (its decisions were fitted for its own network); None when the bundle has
none, and then a target falls through to the next source.  Every threshold lies in
:data:`THRESHOLD_RANGE`; every target in :data:`TARGET_RANGE` (checked here and nowhere else).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

from ..errors import check_param

__all__ = ["DEFAULT_THRESHOLD", "DEFAULT_TARGET", "DEFAULT_AUDIT", "THRESHOLD_RANGE", "TARGET_RANGE", "AUDIT_RANGE",
           "SOURCES", "is_audit_rate", "check_audit_rate", "audit_rate",
           "is_threshold", "is_target", "check_threshold", "check_target", "FieldThreshold",
           "resolve_thresholds", "form_threshold"]

DEFAULT_THRESHOLD = 0.9
"""Threshold when nothing else gives one."""
DEFAULT_TARGET = 0.005
"""Error among accepted fields aimed at when the layout names no target (0.5%: under single-entry
keying's error of about 0.22% only with the doubtful rest checked; see the README)."""
DEFAULT_AUDIT = 0.02
"""Share of the fields that would have been accepted sent to review as spot checks when neither the
command line nor the layout says (formread.read.audit).  2% costs a clerk about two fields in a
hundred and, over a few thousand accepted fields, bounds the error among accepted to within a few
tenths of a percent (one-sided 95% Clopper-Pearson: 0 wrong in 60 audited -> under 4.9%, in 600 ->
under 0.5%); ``audit = 0`` turns it off."""
THRESHOLD_RANGE = "a number in (0, 1]"
TARGET_RANGE = "a number in (0, 0.5)"
AUDIT_RANGE = "a number in [0, 1)"
SOURCES = ("explicit", "field", "field target", "form", "form target", "fitted default", "default")
"""Where a field's threshold came from, as recorded in the ledger and shown to the clerk."""


def _number(v) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)


def is_threshold(v) -> bool:
    """True for a valid acceptance threshold: a finite number in (0, 1]."""
    return _number(v) and 0.0 < v <= 1.0


def is_target(v) -> bool:
    """True for a valid target error among accepted fields: a finite number in (0, 0.5)."""
    return _number(v) and 0.0 < v < 0.5


def is_audit_rate(v) -> bool:
    """True for a valid audit share: a finite number in [0, 1)."""
    return _number(v) and 0.0 <= v < 1.0


def check_audit_rate(v, name: str = "audit") -> float:
    """``v`` as a float, or ParameterError in the project's one message form."""
    check_param(is_audit_rate(v), name, AUDIT_RANGE, v)
    return float(v)


def audit_rate(layout, explicit: float | None = None) -> float:
    """The share of would-be-accepted fields spot-checked: the command line's, the form's, or the default."""
    if explicit is not None:
        return check_audit_rate(explicit)
    return DEFAULT_AUDIT if layout.audit is None else float(layout.audit)


def check_threshold(v, name: str = "threshold") -> float:
    """``v`` as a float, or ParameterError in the project's one message form."""
    check_param(is_threshold(v), name, THRESHOLD_RANGE, v)
    return float(v)


def check_target(v, name: str = "target_error") -> float:
    """``v`` as a float, or ParameterError in the project's one message form."""
    check_param(is_target(v), name, TARGET_RANGE, v)
    return float(v)


@dataclass(frozen=True)
class FieldThreshold:
    """One field's threshold and where it came from (one of :data:`SOURCES`)."""

    value: float
    source: str
    target: float | None = None


Fitted = Callable[[float, "str | None"], "float | None"]


def resolve_thresholds(layout, *, explicit: float | None = None,
                       fitted: Fitted | None = None) -> dict[str, FieldThreshold]:
    """Every field's threshold under the policy of this module, in layout order.

    Parameters
    ----------
    layout : formread.form.layout.Layout
        Uses ``threshold`` and ``target_error`` of the form and of each field.
    explicit : float in (0, 1] or None
        The command line's threshold.
    fitted : callable ``(target, field name or None) -> threshold or None``, or None
        The model bundle's fitted decisions.

    Returns
    -------
    dict of field name to FieldThreshold
    """
    form = form_threshold(layout, explicit=explicit, fitted=fitted)
    out: dict[str, FieldThreshold] = {}
    for f in layout.fields:
        if explicit is not None:
            out[f.name] = form
        elif f.threshold is not None:
            out[f.name] = FieldThreshold(float(f.threshold), "field")
        elif f.target_error is not None and (t := _from_target(fitted, f.target_error, f.name)) is not None:
            out[f.name] = FieldThreshold(t, "field target", f.target_error)
        else:
            out[f.name] = form
    return out


def _from_target(fitted: Fitted | None, target: float, name: str | None) -> float | None:
    if fitted is None:
        return None
    t = fitted(target, name)
    return None if t is None else check_threshold(t, "fitted threshold")


def form_threshold(layout, *, explicit: float | None = None, fitted: Fitted | None = None) -> FieldThreshold:
    """The threshold of the fields that name none of their own (sources 1 and 4-7 of the policy);
    what a run records as its threshold."""
    if explicit is not None:
        return FieldThreshold(check_threshold(explicit), "explicit")
    if layout.threshold is not None:
        return FieldThreshold(float(layout.threshold), "form")
    if layout.target_error is not None:
        t = _from_target(fitted, layout.target_error, None)
        if t is not None:
            return FieldThreshold(t, "form target", layout.target_error)
    t = _from_target(fitted, DEFAULT_TARGET, None)
    if t is not None:
        return FieldThreshold(t, "fitted default", DEFAULT_TARGET)
    return FieldThreshold(DEFAULT_THRESHOLD, "default")
