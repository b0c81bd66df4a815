"""From calibrated digit probabilities to field readings, confidences and decisions.

The network gives, for every digit image of every candidate segmentation of a
field, probabilities over 0-9 (temperature-scaled on clean held-out digits).  This
module turns them into one reading per field, a confidence, and a decision
(``accepted`` or ``review`` with a reason), using the field's own rules and the
relations between fields.  Pure numpy/python.  The few numbers of the model are a
:class:`ConfidenceModel`, fitted for one network and carried by its model bundle
(:mod:`formread.read.bundle`: the caller passes ``bundle.decoder``); :data:`PLAIN`
switches every addition off.

Probability model
-----------------
1. *Digits.*  Each digit's probabilities go through a reliability map
   (``digit_calibration``: the top digit's error ``1 - max p`` is replaced by the
   error rate measured for digits read that sure on development forms),
   optionally after an extra temperature (``temperature_boxed`` / ``temperature_open``):
   digits cut from scans are misread more often than the model's own calibration on
   clean digits says.
2. *Segmentations.*  Candidate ``c`` of a field gets the weight
   ``w_c ~ exp(-cost_c / prior_scale) * prod_k (max_d p_ck(d)) ** digitness``:
   the segmentation prior (sharpened: costs are only roughly scaled log priors)
   times how much each piece looks like one clean digit (a fragment or two touching
   digits rarely gets a sure reading).  Weights sum to 1.
3. *Strings.*  Given ``c`` the digits at its non-blank positions are independent,
   so ``P(s) = sum_c w_c * prod_k p_ck(s_k)`` over the candidates producing string
   ``s``; over all strings of all candidates this sums to 1.  For every candidate its
   ``max_strings`` most probable strings are enumerated exactly (a beam trying the
   top ``top_per_position`` digits per position).
4. *Rules as evidence.*  Written values rarely break the field's rules, so a string
   that breaks one keeps only ``rule_slack`` of its mass; the mass of strings never
   enumerated (rules unknown) is weighed as the enumerated strings are on average
   (by count: ``r + rule_slack * (1 - r)`` with ``r`` the share that keep the rules).

Field stage: the reading is the most probable enumerated string that keeps the
field's own rules (length, range, date, check digit); when none does, the most
probable string is kept and the field goes to review.

**Confidence** (field stage) is the posterior probability of the reading under this
model: ``P(reading) / (P(keep rules) + rule_slack * P(break rules) + (r + rule_slack
* (1 - r)) * P(not enumerated))`` (the reading's own mass counts ``rule_slack`` when it breaks a
rule).  With :data:`PLAIN` the denominator is 1 and the confidence is ``P(reading)``.
``alternatives`` gives the enumerated strings (passing or not) with their
unweighted probabilities ``P(s)``, best first.

Relation stage: fields linked by relations (only relations whose fields all have a
non-empty reading) are decided jointly, as checks between independently read
fields.  For each connected group, each field offers its top ``relation_top``
rule-keeping strings (fewer when the group is large, so that at most
``max_combinations`` combinations are tried; a field with none offers its
rule-breaking reading).  A combination's weight is the product of its strings'
weighted masses; the one with the highest weight that satisfies every relation of
the group is chosen.  A field's confidence becomes the weight of the satisfying
combinations in which it has its chosen string, over the weight of *all*
combinations: satisfying ones fully, examined ones that break a relation times
``relation_slack`` (a writer's slip), and combinations with a string not examined
times ``tail_weight``.  So a relation that holds between fields read independently
is strong evidence that each is right (a misreading rarely keeps an equality), and
one uncertain field whose alternatives break the relation no longer drags down the
others; a relation that fails for every combination tried sends the group's fields
to review as ``rule_failed:relation``.  (``relation_slack = tail_weight = 1`` gives
the joint probability of the readings *and* the relations holding, which lowered
every related field's confidence to the product of all of them.)

The confidence is what :mod:`formread.read.tune` thresholds: a number in [0, 1]
that ranks fields by how likely their reading is right, calibrated on development
demo sets only up to the accuracy of the fitted constants above.

Decision: ``accepted`` when the confidence reaches the field's threshold (resolved by the one
threshold policy, :mod:`formread.form.thresholds`) and every rule and relation holds and the
segmentation is not doubtful; otherwise ``review`` with the first applicable reason
of :data:`REASONS`.
"""

from __future__ import annotations

import dataclasses
import itertools
import math
from dataclasses import dataclass, field

import numpy as np

from ..errors import check_param
from ..form.rules import CompiledRules, FieldRules, check_value

__all__ = [
    "CandidateEvidence", "FieldEvidence", "FieldReading", "decode_page", "decode_field",
    "unregistered_page", "evidence_from_digits", "kbest_strings", "REASONS", "ACCEPTED", "REVIEW",
    "ConfidenceModel", "PLAIN",
]

ACCEPTED = "accepted"
REVIEW = "review"
AUDIT = "audit"
REASONS = ("page_not_registered", "segmentation_doubtful", "missing", "rule_failed:<rule>",
           "best_breaks_rule:<rule>", "low_confidence", "blank_beside_missing", "audit")
"""Reasons for review, a fixed vocabulary.  ``rule_failed:<rule>`` names the rule
(``length``, ``range``, ``date``, ``luhn``, ..., or ``relation``) the reading breaks;
``best_breaks_rule:<rule>``: the reading keeps the rules only because it differs from the
reader's own best reading, which breaks ``<rule>`` (a writer's mistake must reach a person,
see ``ConfidenceModel.rule_fit_ratio``); ``blank_beside_missing``: an optional field found blank
on a page where a field that must be filled is blank too (a grey pen lost by a bilevel scan, a
faded page: a blank read there is no evidence of a blank on paper); ``audit``: a spot check of a
field that would have been accepted (formread.read.audit).  Order of precedence:
page_not_registered (whole page), segmentation_doubtful when there is no reading at all, missing,
rule_failed:<rule>, best_breaks_rule:<rule>, segmentation_doubtful, low_confidence,
blank_beside_missing (decided per page, after the rest), audit."""

TOP_PER_POSITION = 3
MAX_STRINGS = 128
RELATION_TOP = 5
MAX_COMBINATIONS = 20000
N_ALTERNATIVES = 5
_FLOOR = 1e-300


@dataclass(frozen=True)
class ConfidenceModel:
    """The few numbers that turn network outputs into field confidences (see the module docstring).

    Attributes
    ----------
    temperature_boxed, temperature_open : float > 0
        Extra temperature on the digit probabilities of boxed / open fields
        (``p ** (1 / T)``, renormalised).  The model file's temperature is fitted on
        clean held-out digits; digits cut from scans are less sure than it says.
    prior_scale : float > 0
        Segmentation prior ``exp(-cost / prior_scale)`` (smaller = sharper).
    digitness : float >= 0
        Weight of ``sum_k log max_d p_k(d)`` (how much each piece of a split looks
        like one clean digit) in the weight of an open-field segmentation.
    rule_slack : float in (0, 1]
        Prior weight of a string that breaks the field's own rules (a writer's slip),
        against 1 for a string that keeps them.
    relation_slack : float in (0, 1]
        The same for a combination of the group's strings that breaks a relation.
    tail_weight : float in [0, 1]
        Weight of the probability mass of combinations of strings never examined in
        the relation stage, whether they keep the relations being unknown.  (In the
        field stage, strings never examined are weighed by the share of examined
        ones that keep the rules.)
    rule_fit_ratio : float in [0, 1]
        A reading that keeps the field's rules (or the page's relations) while the
        reader's own most probable string breaks them is accepted only when its
        probability is at least this share of that string's; otherwise the field goes to
        review as ``best_breaks_rule:<rule>``.  Rules used to choose a reading must not
        explain away what the writer wrote (a wrong check digit, a count over its range).
        0 switches the test off.
    digit_calibration : tuple of (float, float) pairs, or None
        A reliability map for each digit's error ``e = 1 - max_d p(d)``: knots
        ``(log10 e, log10 e')`` interpolated piecewise linearly (ends held flat);
        the top digit gets ``1 - e'`` and the others share ``e'`` in their
        proportions.  Applied after the temperatures.  None = no map.
    """

    temperature_boxed: float = 1.0
    temperature_open: float = 1.0
    prior_scale: float = 1.0
    digitness: float = 0.0
    rule_slack: float = 1.0
    relation_slack: float = 1.0
    tail_weight: float = 1.0
    digit_calibration: tuple | None = None
    rule_fit_ratio: float = 0.0

    def __post_init__(self):
        for k in ("temperature_boxed", "temperature_open", "prior_scale"):
            check_param(getattr(self, k) > 0, k, "positive", getattr(self, k))
        check_param(self.digitness >= 0, "digitness", ">= 0", self.digitness)
        check_param(0 < self.rule_slack <= 1, "rule_slack", "in (0, 1]", self.rule_slack)
        check_param(0 < self.relation_slack <= 1, "relation_slack", "in (0, 1]", self.relation_slack)
        check_param(0 <= self.tail_weight <= 1, "tail_weight", "in [0, 1]", self.tail_weight)
        check_param(0 <= self.rule_fit_ratio <= 1, "rule_fit_ratio", "in [0, 1]", self.rule_fit_ratio)
        if self.digit_calibration is not None:
            k = np.asarray(self.digit_calibration, dtype=np.float64)
            check_param(k.ndim == 2 and k.shape[1] == 2 and len(k) >= 2 and bool(np.all(np.diff(k[:, 0]) > 0))
                        and bool(np.all(np.diff(k[:, 1]) >= 0)) and bool(np.all(k <= 0)),
                        "digit_calibration", "increasing (log10 e, log10 e') knots <= 0, nondecreasing e'",
                        self.digit_calibration)

    def calibrate(self, p: np.ndarray) -> np.ndarray:
        """Apply the digit reliability map to ``p`` of shape (K, 10) (rows summing to 1); a new array."""
        if self.digit_calibration is None or not p.size:
            return p
        k = np.asarray(self.digit_calibration, dtype=np.float64)
        top = p.argmax(axis=1)
        rows = np.arange(p.shape[0])
        e = np.clip(1.0 - p[rows, top], 1e-15, 0.9)
        e_new = np.minimum(10.0 ** np.interp(np.log10(e), k[:, 0], k[:, 1]), 0.9)
        rest = p.copy()
        rest[rows, top] = 0.0
        s = rest.sum(axis=1)
        rest = np.where(s[:, None] > 0, rest / np.where(s > 0, s, 1.0)[:, None], 1.0 / 9.0)
        rest[rows, top] = 0.0
        out = rest * e_new[:, None]
        out[rows, top] = 1.0 - e_new
        return out


PLAIN = ConfidenceModel()
"""No extra temperature, prior as given, rules as filters only: confidence = P(reading)."""


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
        Own rules (see ``formread.form.rules.check_value``) plus ``relation`` when
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
        self._field_rules = field_rules
        self._rules: dict[str, bool] | None = None

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
    denom: float = 1.0               # weighted mass of every string (see _weighted_total)


def _normalise(name: str, i: int, cand: CandidateEvidence, temperature: float = 1.0,
               model: ConfidenceModel | None = None) -> tuple[np.ndarray, list[int], bool]:
    p = np.asarray(cand.probs, dtype=np.float64)
    if p.ndim == 1 and p.size == 0:
        p = p.reshape(0, 10)
    check_param(bool(p.ndim == 2 and p.shape[1] == 10 and np.isfinite(p).all() and (p >= 0).all()),
                f"{name}.candidates[{i}].probs", "a finite non-negative (K, 10) array", p.shape)
    s = p.sum(axis=1, keepdims=True)
    p = np.where(s > 0, p / np.where(s > 0, s, 1.0), 0.1)
    if temperature != 1.0 and p.size:
        lp = np.log(np.maximum(p, _FLOOR)) / temperature
        p = np.exp(lp - lp.max(axis=1, keepdims=True))
        p /= p.sum(axis=1, keepdims=True)
    if model is not None:
        p = model.calibrate(p)
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


def _weight(opt: _Option, model: ConfidenceModel) -> float:
    """Prior weight of a string: 1 when it keeps the field's rules, ``rule_slack`` when it breaks one."""
    return 1.0 if model.rule_slack == 1.0 or opt.ok else model.rule_slack


_CHECKED_TAIL = 1e-7
"""Enumerated strings beyond this remaining mass are not checked against the rules (counted as tail)."""


def _field_state(ev: FieldEvidence | None, fr: FieldRules, *, top: int, limit: int,
                 model: ConfidenceModel) -> _State:
    name = fr.name
    if ev is None or not ev.candidates:
        reading = FieldReading(name, None, 0.0, detail=(ev.reason if ev else "no evidence for this field"))
        return _State(reading, [], None, [], [], [], True, fr)
    temp = model.temperature_open if fr.kind == "open" else model.temperature_boxed
    probs, positions, interior = [], [], []
    for i, cand in enumerate(ev.candidates):
        p, pos, inner = _normalise(name, i, cand, temp, model)
        probs.append(p)
        positions.append(pos)
        interior.append(inner)
    costs = np.array([float(c.cost) for c in ev.candidates], dtype=np.float64)
    check_param(bool(np.isfinite(costs).all()), f"{name}.candidates[].cost", "finite numbers", costs.tolist())
    z = -costs / model.prior_scale
    if model.digitness:
        z = z + model.digitness * np.array([float(np.log(np.maximum(p[pos].max(axis=1), _FLOOR)).sum())
                                            if pos else 0.0 for p, pos in zip(probs, positions)])
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
    st.denom = _weighted_total(options, model)
    _set_choice(st, chosen, _weight(chosen, model) * chosen.prob / st.denom)
    return st


def _weighted_total(options: list[_Option], model: ConfidenceModel) -> float:
    """``P(keeps rules) + rule_slack * P(breaks them) + w * P(not examined)``; 1 for PLAIN.

    The strings not examined are weighed like the examined ones by count: ``w = r +
    rule_slack * (1 - r)`` with ``r`` the share of examined strings that keep the rules
    (all of them for a field without rules, about a tenth for a check digit).
    """
    if model.rule_slack == 1.0:
        return 1.0
    left = sum(o.prob for o in options)
    seen, n, n_ok = 0.0, 0, 0
    for o in options:
        if left <= _CHECKED_TAIL:
            break
        wt = _weight(o, model)
        seen += wt * o.prob
        n += 1
        n_ok += wt == 1.0
        left -= o.prob
    tail = max(0.0, 1.0 - sum(o.prob for o in options)) + max(0.0, left)
    r = n_ok / n if n else 1.0
    return max(seen + (r + model.rule_slack * (1.0 - r)) * tail, _FLOOR)


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
                     max_combinations: int, model: ConfidenceModel) -> None:
    applicable = [rel for rel in compiled.relations
                  if all(f in states and states[f].reading.reading for f in rel.fields)]
    names = {f for rel in applicable for f in rel.fields}
    for fields, rels in _components(applicable, names):
        n = max(1, min(relation_top, int(math.floor(max_combinations ** (1.0 / len(fields)) + 1e-9))))
        offers = []
        for f in fields:
            st = states[f]
            assert st.chosen is not None  # a field with a reading has its chosen string
            ok = list(itertools.islice((o for o in st.options if o.string and o.ok), n))
            offers.append(ok or [st.chosen])
        weighted = [[_weight(o, model) * o.prob for o in offer] for offer in offers]
        best, best_p, sat = None, -1.0, 0.0
        sat_mass: list[dict[str, float]] = [dict() for _ in fields]
        for idx in itertools.product(*[range(len(o)) for o in offers]):
            combo = [offers[i][j] for i, j in enumerate(idx)]
            values = {f: int(o.string) for f, o in zip(fields, combo)}
            if not all(rel.holds(values) for rel in rels):
                continue
            pj = math.prod(weighted[i][j] for i, j in enumerate(idx))
            sat += pj
            for i, o in enumerate(combo):
                sat_mass[i][o.string] = sat_mass[i].get(o.string, 0.0) + pj
            if pj > best_p:
                best, best_p = combo, pj
        if best is not None:
            # every combination's weighted mass: satisfying ones count fully, examined ones that break
            # a relation count relation_slack, combinations with an unexamined string count tail_weight
            offered = math.prod(sum(ws) for ws in weighted)
            total = math.prod(states[f].denom for f in fields)
            denom = sat + model.relation_slack * max(0.0, offered - sat) + model.tail_weight * max(0.0, total - offered)
            for i, (f, o) in enumerate(zip(fields, best)):
                st = states[f]
                st.reading.rules["relation"] = True
                _set_choice(st, o, sat_mass[i][o.string] / max(denom, _FLOOR))
        else:
            chosen = [states[f].chosen for f in fields]   # set: every field here has a reading
            current = {f: int(o.string) for f, o in zip(fields, chosen)
                       if o is not None and o.string.isascii() and o.string.isdigit()}
            for f in fields:
                failing = [rel for rel in rels if f in rel.fields
                           and (not all(g in current for g in rel.fields) or not rel.holds(current))]
                states[f].reading.rules["relation"] = not failing


def _best_broken(st: _State, model: ConfidenceModel) -> str | None:
    """The rule the reader's own best string breaks, when the reading keeps the rules only by being
    another, much less probable string (see ``ConfidenceModel.rule_fit_ratio``); else None."""
    if not model.rule_fit_ratio or not st.options or st.chosen is None:
        return None
    top = st.options[0]
    if st.chosen.string == top.string or not top.string:
        return None
    if st.chosen.prob >= model.rule_fit_ratio * top.prob:
        return None                  # the rule-keeping reading is itself nearly as likely
    return _first_failure(top.rules) or "relation"


def _decide(st: _State, threshold: float, model: ConfidenceModel | None = None) -> None:
    r = st.reading
    thr = float(threshold)
    r.threshold = thr
    doubtful = st.doubtful or (r.candidate is not None and st.interior_blank[r.candidate])
    failure = _first_failure(r.rules)
    broken = None if model is None or r.reading is None else _best_broken(st, model)
    if r.reading is None:
        reason = "segmentation_doubtful"
    elif r.reading == "" and not st.rules.optional:
        reason = "missing"
    elif failure is not None:
        reason = f"rule_failed:{failure}"
    elif broken is not None:
        reason = f"best_breaks_rule:{broken}"
    elif doubtful:
        reason = "segmentation_doubtful"
    elif r.confidence < thr:
        reason = "low_confidence"
    else:
        reason = None
    r.reason = reason
    r.decision = ACCEPTED if reason is None else REVIEW


def _model(model: ConfidenceModel, cost_scale: float | None) -> ConfidenceModel:
    check_param(isinstance(model, ConfidenceModel), "confidence", "a ConfidenceModel (bundle.decoder)",
                type(model).__name__)
    if cost_scale is not None:
        check_param(cost_scale > 0, "cost_scale", "positive", cost_scale)
        model = dataclasses.replace(model, prior_scale=float(cost_scale))
    return model


def _threshold(thresholds, name: str) -> float:
    t = thresholds.get(name) if thresholds is not None else None
    t = getattr(t, "value", t)          # a FieldThreshold or a plain number
    check_param(t is not None, f"thresholds[{name!r}]", "a threshold for every field (resolve_thresholds)", t)
    assert t is not None  # check_param raised otherwise
    return float(t)


def decode_field(evidence: FieldEvidence | None, rules: FieldRules, *, threshold: float,
                 confidence: ConfidenceModel, top_per_position: int = TOP_PER_POSITION,
                 max_strings: int = MAX_STRINGS, cost_scale: float | None = None) -> FieldReading:
    """Decode one field on its own (its own rules only, no relations); see :func:`decode_page`."""
    m = _model(confidence, cost_scale)
    st = _field_state(evidence, rules, top=top_per_position, limit=max_strings, model=m)
    _decide(st, threshold, m)
    return st.reading


def decode_page(evidence: dict[str, FieldEvidence], layout, *, confidence: ConfidenceModel,
                thresholds, top_per_position: int = TOP_PER_POSITION,
                max_strings: int = MAX_STRINGS, relation_top: int = RELATION_TOP,
                max_combinations: int = MAX_COMBINATIONS, cost_scale: float | None = None
                ) -> dict[str, FieldReading]:
    """Read every field of a registered page.

    Parameters
    ----------
    evidence : dict of str to FieldEvidence
        Per field name; a field missing here (or with no candidates) gets no reading
        and goes to review as ``segmentation_doubtful``.
    layout : formread.form.layout.Layout
        Its ``fields`` give the order of the result; ``layout.rules`` the rules and relations.
    confidence : ConfidenceModel
        The decoder's constants, fitted for the network that gave the probabilities
        (``bundle.decoder``); :data:`PLAIN` gives confidence = P(reading).
    thresholds : mapping of field name to FieldThreshold (or float)
        Every field's threshold, from ``formread.form.thresholds.resolve_thresholds``.
    top_per_position, max_strings, relation_top, max_combinations
        Search sizes (see the module docstring).
    cost_scale : float or None
        Overrides the model's ``prior_scale`` when given.

    Returns
    -------
    dict of str to FieldReading
        In the layout's field order.
    """
    check_param(top_per_position >= 1 and max_strings >= 1 and relation_top >= 1 and max_combinations >= 1,
                "search sizes", "positive integers",
                (top_per_position, max_strings, relation_top, max_combinations))
    m = _model(confidence, cost_scale)
    compiled = layout.rules
    states = {}
    for f in layout.fields:
        states[f.name] = _field_state(evidence.get(f.name), compiled.fields[f.name], top=top_per_position,
                                      limit=max_strings, model=m)
    _apply_relations(states, compiled, relation_top=relation_top, max_combinations=max_combinations, model=m)
    for name, st in states.items():
        _decide(st, _threshold(thresholds, name), m)
    if any(st.reading.reason == "missing" for st in states.values()):
        for st in states.values():
            if st.reading.reading == "" and st.reading.decision == ACCEPTED:
                st.reading.reason, st.reading.decision = "blank_beside_missing", REVIEW
    return {name: st.reading for name, st in states.items()}


def unregistered_page(layout, *, thresholds) -> dict[str, FieldReading]:
    """Every field of ``layout`` without a reading, in review as ``page_not_registered``."""
    return {f.name: FieldReading(f.name, None, 0.0, decision=REVIEW, reason="page_not_registered",
                                 threshold=_threshold(thresholds, f.name))
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
    blank = field_digits.blank if field_digits.kind == "boxed" else None
    return FieldEvidence(
        name=field_digits.name,
        candidates=[CandidateEvidence(p, float(c.cost), blank) for p, c in zip(probs, cands)],
        doubtful=bool(field_digits.doubtful),
        reason=field_digits.reason,
    )
