"""From calibrated digit probabilities to field readings, confidences and decisions.

The network gives, for every digit image of every candidate segmentation of a
field, calibrated probabilities over 0-9.  This module turns them into one reading
per field, a confidence, and a decision (``accepted`` or ``review`` with a reason),
using the field's own rules and the relations between fields.  Pure numpy/python.

Probability model
-----------------
A field's evidence is a list of candidate segmentations ``c`` with a cost; the
segmentation prior is ``w_c = softmax(-cost_c / cost_scale)``.  Given ``c``, the
digits at its non-blank positions are independent with the calibrated
probabilities ``probs[k]``; blank cells (boxed fields) contribute no digit.  So
``P(s) = sum_c w_c * prod_k probs_c[k, s_k]`` over the segmentations ``c`` that
produce string ``s``; over *all* strings of all segmentations this sums to 1.

Field stage: for every candidate, its ``max_strings`` most probable strings are
enumerated exactly (a beam over positions, trying the top ``top_per_position``
digits of each position).  The reading is the most probable enumerated string
that satisfies the field's own rules (length, range, date, check digit); when none
does, the most probable string is kept and the field goes to review.

**Confidence** is ``P(reading) / Z`` where ``Z`` is the total probability of every
digit string of every candidate segmentation, i.e. of the strings considered that
satisfy the rules, those that break them, *and* the tail that was not enumerated.
``Z`` is 1 by construction, so the confidence is simply ``P(reading)``: when the
likely readings break the rules, their mass stays in the denominator and the
confidence is low.  ``alternatives`` gives the enumerated strings (passing or not)
with the same probabilities, best first.

Relation stage: fields linked by relations (only relations whose fields all have
a non-empty reading) are decided jointly.  For each connected group, each field
offers its top ``relation_top`` rule-satisfying strings (fewer when the group is
large, so that at most ``max_combinations`` combinations are tried; a field with
none offers its rule-breaking reading).  The combination with the highest product
of probabilities that satisfies every relation of the group is chosen.  A field's
confidence becomes the total probability of the satisfying combinations in which
it has its chosen string, normalised over *all* combinations of all strings of the
group's fields (again total 1; combinations using strings outside the top ones
count as not satisfying).  So a relation can fix a reading, and it can only lower
a confidence, never raise it.  This is consistent with the field stage: mass that
breaks a rule stays in the denominator.  (Normalising over the satisfying
combinations only, the probability *given* that the relations hold, was tried and
dropped: over the few strings considered it gave confidence near 1 to wrong
readings whenever the true string lay outside them.)

Decision: ``accepted`` when the confidence reaches the threshold (the field's own
``threshold``, else the page threshold) and every rule and relation holds and the
segmentation is not doubtful; otherwise ``review`` with the first applicable reason
of :data:`REASONS`.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass, field

import numpy as np

from formread.errors import check_param
from formread.read.rules import CompiledRules, FieldRules, check_value

__all__ = [
    "CandidateEvidence", "FieldEvidence", "FieldReading", "decode_page", "decode_field",
    "unregistered_page", "evidence_from_digits", "kbest_strings", "REASONS", "ACCEPTED", "REVIEW",
    "DEFAULT_THRESHOLD",
]

ACCEPTED = "accepted"
REVIEW = "review"
REASONS = ("page_not_registered", "segmentation_doubtful", "missing", "rule_failed:<rule>", "low_confidence")
"""Reasons for review, a fixed vocabulary.  ``rule_failed:<rule>`` names the rule
(``length``, ``range``, ``date``, ``luhn``, ..., or ``relation``).  Order of
precedence: page_not_registered (whole page), segmentation_doubtful when there is
no reading at all, missing, rule_failed:<rule>, segmentation_doubtful, low_confidence."""

TOP_PER_POSITION = 3
MAX_STRINGS = 128
RELATION_TOP = 5
MAX_COMBINATIONS = 20000
N_ALTERNATIVES = 5
DEFAULT_THRESHOLD = 0.9
"""Page threshold when neither the caller nor the layout gives one."""
_FLOOR = 1e-300


@dataclass
class CandidateEvidence:
    """One candidate segmentation of a field.

    Attributes
    ----------
    probs : ndarray of shape (K, 10), float
        Calibrated digit probabilities per position (temperature already applied);
        rows are renormalised to sum 1.
    cost : float
        Segmentation cost, a negative log prior up to a constant (lower is better).
    blank : ndarray of shape (K,), bool, or None
        Boxed fields: True where the cell is blank (its row of ``probs`` is ignored).
    """

    probs: np.ndarray
    cost: float = 0.0
    blank: np.ndarray | None = None


@dataclass
class FieldEvidence:
    """Everything the decoder needs about one field of one page.

    ``doubtful``/``reason`` come from segmentation (``FieldDigits``); ``reason`` is
    free text kept as ``FieldReading.detail``.  No candidates means segmentation failed.
    """

    name: str
    candidates: list[CandidateEvidence]
    doubtful: bool = False
    reason: str | None = None


@dataclass
class FieldReading:
    """The decoder's verdict on one field.

    Attributes
    ----------
    name : str
    reading : str or None
        Chosen digit string; '' = left empty; None = no reading (page not
        registered, segmentation failed).
    confidence : float in [0, 1]
        See the module docstring for what it is normalised over.
    alternatives : list of (str, float)
        Up to 5 strings considered, best first, with their probabilities.
    digit_probs : list of list of (int, float)
        Per position of the reading, its top 3 digits with probabilities.
    rules : dict of str to bool
        Own rules (see ``formread.read.rules.check_value``) plus ``relation`` when
        a relation was evaluated.
    decision : str
        'accepted' or 'review'.
    reason : str or None
        Why review, from :data:`REASONS`; None when accepted.
    candidate : int or None
        Index of the segmentation the reading came from (most probable one).
    positions : list of int
        Rows of that candidate's ``probs`` (and digit images) forming the reading.
    threshold : float
        Threshold the confidence was compared with.
    detail : str or None
        Free text from segmentation, when it gave any.
    """

    name: str
    reading: str | None
    confidence: float
    alternatives: list[tuple[str, float]] = field(default_factory=list)
    digit_probs: list[list[tuple[int, float]]] = field(default_factory=list)
    rules: dict[str, bool] = field(default_factory=dict)
    decision: str = REVIEW
    reason: str | None = None
    candidate: int | None = None
    positions: list[int] = field(default_factory=list)
    threshold: float = 1.0
    detail: str | None = None

    def to_record(self) -> dict:
        """A JSON-ready dict (lists instead of tuples, plain floats)."""
        return {
            "name": self.name, "reading": self.reading, "confidence": float(self.confidence),
            "alternatives": [[s, float(p)] for s, p in self.alternatives],
            "digit_probs": [[[int(d), float(p)] for d, p in pos] for pos in self.digit_probs],
            "rules": {k: bool(v) for k, v in self.rules.items()}, "decision": self.decision,
            "reason": self.reason, "candidate": self.candidate, "positions": list(self.positions),
            "threshold": float(self.threshold), "detail": self.detail,
        }


def kbest_strings(logp: np.ndarray, *, top: int = TOP_PER_POSITION, limit: int = MAX_STRINGS
                  ) -> list[tuple[str, float]]:
    """The most probable digit strings, best first.

    A beam over positions keeping the ``limit`` best prefixes is exact here: the
    score is a sum over positions, so every prefix of one of the ``limit`` best
    strings is itself among the ``limit`` best prefixes.

    Parameters
    ----------
    logp : ndarray of shape (K, 10), float
        Log probabilities per position (K >= 1).
    top : int
        Digits considered per position.
    limit : int
        Maximum number of strings returned.

    Returns
    -------
    list of (str, float)
        Strings of length K and their log probabilities, in decreasing order.
    """
    top = min(top, 10)
    order = np.argsort(-logp, axis=1, kind="stable")[:, :top]          # (K, top)
    vals = np.take_along_axis(logp, order, axis=1)                      # (K, top)
    scores = vals[0].copy()                                             # (B,)
    digits = order[0][:, None]                                          # (B, i)
    for i in range(1, logp.shape[0]):
        cand = (scores[:, None] + vals[i][None, :]).reshape(-1)         # (B * top,)
        keep = np.argsort(-cand, kind="stable")[:limit]
        digits = np.concatenate([digits[keep // top], order[i][keep % top][:, None]], axis=1)
        scores = cand[keep]
    keep = np.argsort(-scores, kind="stable")[:limit]
    text = (digits[keep].astype(np.uint8) + 48).tobytes().decode("ascii")
    k = digits.shape[1]
    return [(text[j * k:(j + 1) * k], float(v)) for j, v in enumerate(scores[keep].tolist())]


class _Option:
    """One string considered for a field; its rules are checked only when asked (most never are)."""

    __slots__ = ("string", "prob", "candidate", "_field_rules", "_rules")

    def __init__(self, string: str, prob: float, candidate: int, field_rules: FieldRules):
        self.string, self.prob, self.candidate = string, prob, candidate
        self._field_rules, self._rules = field_rules, None

    @property
    def rules(self) -> dict[str, bool]:
        if self._rules is None:
            self._rules = check_value(self._field_rules, self.string)
        return self._rules

    @property
    def ok(self) -> bool:
        return all(self.rules.values())


@dataclass
class _State:
    reading: FieldReading
    options: list[_Option]          # enumerated strings, most probable first
    chosen: _Option | None
    probs: list[np.ndarray]          # normalised (K, 10) per candidate
    positions: list[list[int]]       # non-blank rows per candidate
    interior_blank: list[bool]
    doubtful: bool
    rules: FieldRules


def _normalise(name: str, i: int, cand: CandidateEvidence) -> tuple[np.ndarray, list[int], bool]:
    p = np.asarray(cand.probs, dtype=np.float64)
    if p.ndim == 1 and p.size == 0:
        p = p.reshape(0, 10)
    check_param(p.ndim == 2 and p.shape[1] == 10 and np.isfinite(p).all() and (p >= 0).all(),
                f"{name}.candidates[{i}].probs", "a finite non-negative (K, 10) array", p.shape)
    s = p.sum(axis=1, keepdims=True)
    p = np.where(s > 0, p / np.where(s > 0, s, 1.0), 0.1)
    k = p.shape[0]
    if cand.blank is None:
        pos = list(range(k))
    else:
        b = np.asarray(cand.blank, dtype=bool).reshape(-1)
        check_param(b.shape == (k,), f"{name}.candidates[{i}].blank", f"a bool array of shape ({k},)", b.shape)
        pos = [int(j) for j in np.flatnonzero(~b)]
    interior = bool(pos) and (pos[-1] - pos[0] + 1) != len(pos)
    return p, pos, interior


def _digit_probs(p: np.ndarray, pos: list[int]) -> list[list[tuple[int, float]]]:
    out = []
    for j in pos:
        order = np.argsort(-p[j], kind="stable")[:3]
        out.append([(int(d), float(p[j, d])) for d in order])
    return out


def _first_failure(rules: dict[str, bool]) -> str | None:
    for k, v in rules.items():
        if not v:
            return k
    return None


def _field_state(ev: FieldEvidence | None, fr: FieldRules, *, top: int, limit: int, cost_scale: float) -> _State:
    name = fr.name
    if ev is None or not ev.candidates:
        reading = FieldReading(name, None, 0.0, detail=(ev.reason if ev else "no evidence for this field"))
        return _State(reading, [], None, [], [], [], True, fr)
    probs, positions, interior = [], [], []
    for i, cand in enumerate(ev.candidates):
        p, pos, inner = _normalise(name, i, cand)
        probs.append(p)
        positions.append(pos)
        interior.append(inner)
    costs = np.array([float(c.cost) for c in ev.candidates], dtype=np.float64)
    check_param(bool(np.isfinite(costs).all()), f"{name}.candidates[].cost", "finite numbers", costs.tolist())
    z = -costs / cost_scale
    w = np.exp(z - z.max())
    w /= w.sum()
    mass: dict[str, float] = {}
    best_from: dict[str, tuple[float, int]] = {}
    for i, (p, pos) in enumerate(zip(probs, positions)):
        if not pos:
            strings = [("", 0.0)]
        else:
            strings = kbest_strings(np.log(np.maximum(p[pos], _FLOOR)), top=top, limit=limit)
        for s, lp in strings:
            m = float(w[i] * math.exp(lp))
            mass[s] = mass.get(s, 0.0) + m
            if s not in best_from or m > best_from[s][0]:
                best_from[s] = (m, i)
    options = [_Option(s, m, best_from[s][1], fr)
               for s, m in sorted(mass.items(), key=lambda kv: (-kv[1], kv[0]))]
    chosen = next((o for o in options if o.ok), options[0])
    reading = FieldReading(name, chosen.string, 0.0, detail=ev.reason,
                           alternatives=[(o.string, o.prob) for o in options[:N_ALTERNATIVES]])
    st = _State(reading, options, None, probs, positions, interior, bool(ev.doubtful), fr)
    _set_choice(st, chosen, chosen.prob)
    return st


def _set_choice(st: _State, opt: _Option, confidence: float) -> None:
    st.chosen = opt
    r = st.reading
    r.reading = opt.string
    r.confidence = float(min(1.0, max(0.0, confidence)))
    r.candidate = opt.candidate
    r.positions = list(st.positions[opt.candidate])
    r.digit_probs = _digit_probs(st.probs[opt.candidate], r.positions)
    relation = r.rules.get("relation")
    r.rules = dict(opt.rules)
    if relation is not None:
        r.rules["relation"] = relation


def _components(relations, names: set[str]) -> list[tuple[list[str], list]]:
    """Group applicable relations into connected groups of fields."""
    parent = {n: n for n in names}

    def find(a):
        while parent[a] != a:
            parent[a] = parent[parent[a]]
            a = parent[a]
        return a

    for rel in relations:
        for f in rel.fields[1:]:
            parent[find(f)] = find(rel.fields[0])
    groups: dict[str, tuple[list[str], list]] = {}
    for rel in relations:
        g = groups.setdefault(find(rel.fields[0]), ([], []))
        g[1].append(rel)
        for f in rel.fields:
            if f not in g[0]:
                g[0].append(f)
    return list(groups.values())


def _apply_relations(states: dict[str, _State], compiled: CompiledRules, *, relation_top: int,
                     max_combinations: int) -> None:
    applicable = [rel for rel in compiled.relations
                  if all(f in states and states[f].reading.reading for f in rel.fields)]
    names = {f for rel in applicable for f in rel.fields}
    for fields, rels in _components(applicable, names):
        n = max(1, min(relation_top, int(math.floor(max_combinations ** (1.0 / len(fields)) + 1e-9))))
        offers = []
        for f in fields:
            st = states[f]
            ok = list(itertools.islice((o for o in st.options if o.string and o.ok), n))
            offers.append(ok or [st.chosen])
        best, best_p = None, -1.0
        sat_mass = [dict() for _ in fields]
        for combo in itertools.product(*offers):
            values = {f: int(o.string) for f, o in zip(fields, combo)}
            if not all(rel.holds(values) for rel in rels):
                continue
            pj = math.prod(o.prob for o in combo)
            for i, o in enumerate(combo):
                sat_mass[i][o.string] = sat_mass[i].get(o.string, 0.0) + pj
            if pj > best_p:
                best, best_p = combo, pj
        if best is not None:
            for i, (f, o) in enumerate(zip(fields, best)):
                st = states[f]
                st.reading.rules["relation"] = True
                _set_choice(st, o, sat_mass[i][o.string])
        else:
            current = {f: int(states[f].chosen.string) for f in fields
                       if states[f].chosen.string.isascii() and states[f].chosen.string.isdigit()}
            for f in fields:
                failing = [rel for rel in rels if f in rel.fields
                           and (not all(g in current for g in rel.fields) or not rel.holds(current))]
                states[f].reading.rules["relation"] = not failing


def _decide(st: _State, threshold: float) -> None:
    r = st.reading
    thr = st.rules.threshold if st.rules.threshold is not None else threshold
    r.threshold = float(thr)
    doubtful = st.doubtful or (r.candidate is not None and st.interior_blank[r.candidate])
    failure = _first_failure(r.rules)
    if r.reading is None:
        reason = "segmentation_doubtful"
    elif r.reading == "" and not st.rules.optional:
        reason = "missing"
    elif failure is not None:
        reason = f"rule_failed:{failure}"
    elif doubtful:
        reason = "segmentation_doubtful"
    elif r.confidence < thr:
        reason = "low_confidence"
    else:
        reason = None
    r.reason = reason
    r.decision = ACCEPTED if reason is None else REVIEW


def decode_field(evidence: FieldEvidence | None, rules: FieldRules, *, threshold: float,
                 top_per_position: int = TOP_PER_POSITION, max_strings: int = MAX_STRINGS,
                 cost_scale: float = 1.0) -> FieldReading:
    """Decode one field on its own (its own rules only, no relations); see :func:`decode_page`."""
    st = _field_state(evidence, rules, top=top_per_position, limit=max_strings, cost_scale=cost_scale)
    _decide(st, threshold)
    return st.reading


def decode_page(evidence: dict[str, FieldEvidence], compiled_rules: CompiledRules, layout, *,
                threshold: float | None = None, top_per_position: int = TOP_PER_POSITION,
                max_strings: int = MAX_STRINGS, relation_top: int = RELATION_TOP,
                max_combinations: int = MAX_COMBINATIONS, cost_scale: float = 1.0
                ) -> dict[str, FieldReading]:
    """Read every field of a registered page.

    Parameters
    ----------
    evidence : dict of str to FieldEvidence
        Per field name; a field missing here (or with no candidates) gets no reading
        and goes to review as ``segmentation_doubtful``.
    compiled_rules : CompiledRules
        From ``compile_rules(layout)``.
    layout : Layout
        Its ``fields`` give the order of the result; ``layout.threshold`` is used
        when ``threshold`` is None (and :data:`DEFAULT_THRESHOLD` when both are).
    threshold : float in [0, 1] or None
        Page threshold (a field's own ``threshold`` takes precedence).
    top_per_position, max_strings, relation_top, max_combinations, cost_scale
        Search sizes and the scale of segmentation costs (see the module docstring).

    Returns
    -------
    dict of str to FieldReading
        In the layout's field order.
    """
    thr = _page_threshold(layout, threshold)
    check_param(isinstance(thr, (int, float)) and 0.0 <= thr <= 1.0, "threshold", "a number in [0, 1]", thr)
    check_param(top_per_position >= 1 and max_strings >= 1 and relation_top >= 1 and max_combinations >= 1,
                "search sizes", "positive integers",
                (top_per_position, max_strings, relation_top, max_combinations))
    check_param(cost_scale > 0, "cost_scale", "positive", cost_scale)
    states = {}
    for f in layout.fields:
        states[f.name] = _field_state(evidence.get(f.name), compiled_rules.fields[f.name], top=top_per_position,
                                      limit=max_strings, cost_scale=cost_scale)
    _apply_relations(states, compiled_rules, relation_top=relation_top, max_combinations=max_combinations)
    for st in states.values():
        _decide(st, float(thr))
    return {name: st.reading for name, st in states.items()}


def _page_threshold(layout, threshold):
    if threshold is not None:
        return threshold
    t = getattr(layout, "threshold", None)
    return DEFAULT_THRESHOLD if t is None else t


def unregistered_page(layout, *, threshold: float | None = None) -> dict[str, FieldReading]:
    """Every field of ``layout`` without a reading, in review as ``page_not_registered``."""
    thr = _page_threshold(layout, threshold)
    return {f.name: FieldReading(f.name, None, 0.0, decision=REVIEW, reason="page_not_registered",
                                 threshold=float(f.threshold if f.threshold is not None else thr))
            for f in layout.fields}


def evidence_from_digits(field_digits, probs: list[np.ndarray]) -> FieldEvidence:
    """Build a field's evidence from imaging's ``FieldDigits`` and the network's outputs.

    Parameters
    ----------
    field_digits : FieldDigits
        Uses ``name``, ``kind``, ``candidates`` (their ``cost``), ``blank`` (boxed),
        ``doubtful`` and ``reason``.
    probs : list of ndarray of shape (K_i, 10), float
        Calibrated probabilities for the digits of each candidate, same order.
    """
    cands = field_digits.candidates
    check_param(len(probs) == len(cands), "probs", f"one array per candidate ({len(cands)})", len(probs))
    blank = getattr(field_digits, "blank", None) if getattr(field_digits, "kind", "open") == "boxed" else None
    return FieldEvidence(
        name=field_digits.name,
        candidates=[CandidateEvidence(p, float(c.cost), blank) for p, c in zip(probs, cands)],
        doubtful=bool(getattr(field_digits, "doubtful", False)),
        reason=getattr(field_digits, "reason", None),
    )
