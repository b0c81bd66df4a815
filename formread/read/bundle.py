"""The model bundle: the network(s) and every decision fitted for them, loaded from one file.

A network's confidences are only as good as the constants fitted for it: the temperature (fitted
on clean validation digits), the decoder's :class:`~formread.read.decode.ConfidenceModel` (digit
reliability on digits cut from forms, segmentation prior, rule weights) and the thresholds that
meet a target error among accepted fields.  They live in the model file's header, checked by its
checksum, and this module is the only reader of them: reading, scoring, tuning, review and
learning take a :class:`Bundle`.

Header keys read here (format version 2; see formread.nn.modelfile):

``decoder``
    ``{"constants": {ConfidenceModel fields}, "fitted_for": weights_sha256, "fitted_on": text}``.
``decisions``
    ``{"fitted_for": weights_sha256, "fitted_on": text, "forms": {form name: {"fields": {field name:
    [[confidence, correct 0/1, eligible 0/1], ...]}}}}``: held-out evidence from which a threshold
    for any target error is chosen (see :meth:`Decisions.threshold_for`).

Each part is **fitted** when its ``fitted_for`` names this file's own weights, **inherited** when it
was fitted for another network (a retrained network that kept its parent's constants: shown as
such wherever the model is shown, and never promoted by ``formread learn``), and for a first-release
file (format version 1, no decoder in the header) the **shipped constants** below, fitted for the
first shipped network.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..errors import ModelFileError
from ..nn.model import Sequential
from ..nn.modelfile import load_networks, networks_sha256, save_networks
from .decode import ConfidenceModel
from .tune import choose_threshold

__all__ = ["Bundle", "Decisions", "load_bundle", "save_bundle", "shipped_decoder", "FITTED", "INHERITED",
           "SHIPPED_CONSTANTS", "SHIPPED_WEIGHTS_SHA256", "MIN_FIELD_EVIDENCE"]

FITTED = "fitted"
INHERITED = "inherited"
SHIPPED_CONSTANTS = "shipped constants"

_SHIPPED_DIGIT_RELIABILITY = ((-7.0, -2.9), (-5.0, -2.9), (-4.25, -2.1), (-3.25, -1.6), (-2.75, -1.3),
                              (-2.25, -1.05), (-1.75, -0.95), (-1.25, -0.66), (-0.75, -0.47), (-0.25, -0.3))
_SHIPPED_DECODER = ConfidenceModel(prior_scale=0.25, digitness=3.0, rule_slack=0.03, relation_slack=0.003,
                                   tail_weight=0.01, digit_calibration=_SHIPPED_DIGIT_RELIABILITY,
                                   rule_fit_ratio=0.1)
"""The decoder constants of the first shipped network, for model files of format version 1.

Fitted with that network on development demo sets only (``formread demo make --count 60 --seed
101`` and ``--count 120 --seed 102``, 1080 fields; never on the shipped set, seed 7, nor the check
set, seed 11): the digit reliability map was measured on 6008 digits whose segmentation had the
right digit count (the share of misread digits per band of ``log10(1 - max p)``, smoothed to be
nondecreasing: digits read at 0.99-0.999 were wrong 3-5% of the time, and even digits read at
0.99999 or more about 0.13% of the time); the other values by coordinate search minimising the
review rate at 0.5% error among accepted fields plus the error at 15% review.  ``rule_fit_ratio``
0.1: on 180 development cards (``--count 180 --seed 103``) the guard sent no field to review that
would have been accepted at 0.1 (9 right ones at 0.2), and every writer's mistake that the reader's
own best string kept reached a person (the one accepted mistake was a misread that happened to keep
the check digit, which no rule can catch)."""

SHIPPED_WEIGHTS_SHA256 = "2cfebe6b53931e6decfd24a7fc7243546e9401561de5eed8b2d3291908cd77db"
"""``weights_sha256`` of the first shipped network (``formread train --seed 1``), which the
shipped constants were fitted for."""


def shipped_decoder() -> tuple[ConfidenceModel, str]:
    """(the shipped decoder constants, the weights they were fitted for): what a newly trained
    network starts with; they count as fitted only when its weights are those very weights."""
    return _SHIPPED_DECODER, SHIPPED_WEIGHTS_SHA256


MIN_FIELD_EVIDENCE = 150
"""Held-out fields a field needs for a threshold of its own; with fewer, its form's pooled
evidence decides (a rate of 0.5% cannot be told from 0 on fewer fields)."""


def _decoder_to_json(m: ConfidenceModel) -> dict:
    d = dataclasses.asdict(m)
    if d["digit_calibration"] is not None:
        d["digit_calibration"] = [list(map(float, k)) for k in d["digit_calibration"]]
    return d


def _decoder_from_json(path: Path, d) -> ConfidenceModel:
    if not isinstance(d, dict):
        raise ModelFileError(f"{path}: damaged model file (decoder constants must be a table)")
    known = {f.name for f in dataclasses.fields(ConfidenceModel)}
    kw = {k: v for k, v in d.items() if k in known}
    if isinstance(kw.get("digit_calibration"), list):
        kw["digit_calibration"] = tuple(tuple(k) for k in kw["digit_calibration"])
    try:
        return ConfidenceModel(**kw)
    except (TypeError, ValueError) as e:
        raise ModelFileError(f"{path}: damaged model file (decoder constants: {e})") from None


def _evidence(path: Path, rows) -> np.ndarray:
    """Held-out evidence rows [confidence, correct, eligible] -> ndarray of shape (N, 3), float64."""
    a = np.asarray(rows, dtype=np.float64) if isinstance(rows, list) and rows else np.zeros((0, 3))
    if a.ndim != 2 or a.shape[1] != 3 or not np.isfinite(a).all() or (a[:, 0] < 0).any() or (a[:, 0] > 1).any():
        raise ModelFileError(f"{path}: damaged model file (decision evidence must be [confidence, correct, "
                             "eligible] rows)")
    return a


@dataclass(frozen=True)
class Decisions:
    """Thresholds fitted for one network, held as the held-out evidence they were chosen from.

    Attributes
    ----------
    forms : dict of form name to dict of field name to ndarray of shape (N, 3), float64
        Per field: confidence, correct (0/1) and eligible (0/1: accepted or in review only for low
        confidence) of held-out fields read by this bundle's network with its decoder.
    status : str
        :data:`FITTED` or :data:`INHERITED` (see the module docstring); "none" when empty.
    fitted_on : str
        What the evidence is (pages, runs, when).
    """

    forms: dict = field(default_factory=dict)
    status: str = "none"
    fitted_on: str = ""
    fitted_for: str = ""

    def __bool__(self) -> bool:
        return bool(self.forms)

    def evidence(self, form: str | None, name: str | None) -> np.ndarray:
        """The evidence rows for a field (when it has enough of its own), its form, or every form."""
        forms = self.forms if form not in self.forms else {form: self.forms[form]}
        if form in self.forms and name is not None:
            mine = self.forms[form].get(name)
            if mine is not None and len(mine) >= MIN_FIELD_EVIDENCE:
                return mine
        parts = [a for fields in forms.values() for a in fields.values()]
        return np.concatenate(parts) if parts else np.zeros((0, 3))

    def threshold_for(self, form: str | None, name: str | None, target: float) -> float | None:
        """The lowest threshold whose error among accepted held-out fields, observed or predicted by
        their confidences (whichever is larger; formread.read.tune, criterion "calibrated"), stays
        within ``target``; None when there is no evidence or no threshold meets it (the policy then
        falls through)."""
        ev = self.evidence(form, name)
        if not len(ev):
            return None
        res = choose_threshold(ev[:, 0], ev[:, 1] > 0.5, ev[:, 2] > 0.5, target=target, criterion="calibrated")
        return float(min(1.0, res.threshold)) if res.met else None

    def to_json(self, fitted_for: str) -> dict:
        return {"fitted_for": fitted_for, "fitted_on": self.fitted_on,
                "forms": {f: {"fields": {n: np.round(a, 6).tolist() for n, a in fields.items()}}
                          for f, fields in self.forms.items()}}


@dataclass(frozen=True)
class Bundle:
    """A loaded model bundle (see the module docstring).

    Attributes
    ----------
    path : Path
    networks : tuple of Sequential (probabilities averaged when several)
    temperature : float
    labels : tuple of str
    decoder : ConfidenceModel
    decoder_status : str            :data:`FITTED`, :data:`INHERITED` or :data:`SHIPPED_CONSTANTS`
    decisions : Decisions
    header : dict                   the whole verified header (provenance: training, metrics, created)
    decoder_fitted_for : str        weights the decoder constants were fitted for
    decoder_fitted_on : str         what they were fitted on
    """

    path: Path
    networks: tuple
    temperature: float
    labels: tuple
    decoder: ConfidenceModel
    decoder_status: str
    decisions: Decisions
    header: dict
    decoder_fitted_for: str = ""
    decoder_fitted_on: str = ""

    @property
    def weights_sha256(self) -> str:
        """Identifies the networks (what fitted constants name as "fitted for")."""
        return str(self.header.get("weights_sha256") or self.header.get("sha256"))

    @property
    def sha256(self) -> str:
        """The file's checksum (weights and, for format version 2, the header)."""
        return str(self.header.get("sha256"))

    @property
    def refitted(self) -> bool:
        """True when the decoder constants were fitted for these very networks."""
        return self.decoder_status == FITTED

    def predict_proba(self, x: np.ndarray, batch_size: int = 256, temperature: float | None = None) -> np.ndarray:
        """Calibrated digit probabilities.

        Parameters
        ----------
        x : ndarray of shape (N, 1, 28, 28), float32
        temperature : float or None
            None: the bundle's fitted temperature (1.0 gives the raw probabilities).

        Returns
        -------
        ndarray of shape (N, 10), float32: softmax(logits / temperature), averaged over the networks
        """
        t = self.temperature if temperature is None else temperature
        p = [net.predict_proba(x, batch_size=batch_size, temperature=t) for net in self.networks]
        return p[0] if len(p) == 1 else np.mean(p, axis=0).astype(np.float32)

    def fitted_threshold(self, form: str | None):
        """The ``fitted(target, field)`` callable the threshold policy takes, for one form."""
        if not self.decisions:
            return None
        return lambda target, name: self.decisions.threshold_for(form, name, target)

    def save_successor(self, path, networks, header: dict) -> Bundle:
        """Write new networks (a retrained version) that keep this bundle's fitted parts, as
        inherited: they were fitted for this bundle's networks, not the new ones."""
        return save_bundle(path, networks, header, decoder=self.decoder, decoder_fitted_for=self.decoder_fitted_for,
                           decoder_fitted_on=self.decoder_fitted_on, decisions=self.decisions,
                           decisions_fitted_for=self.decisions.fitted_for or None)

    def summary(self) -> dict:
        """What the ledger records of the bundle that read a run (JSON-ready)."""
        return {"file": self.path.name, "sha256": self.sha256, "weights_sha256": self.weights_sha256,
                "networks": len(self.networks), "temperature": self.temperature,
                "decoder": self.decoder_status, "decisions": self.decisions.status,
                "decisions_fitted_on": self.decisions.fitted_on}

    def describe(self) -> list[str]:
        """Lines saying where each fitted part came from, for ``formread info`` and ``read``."""
        out = [f"decoder constants: {self.decoder_status}"
               + (" (fitted for another network: run formread learn to refit them)"
                  if self.decoder_status == INHERITED else "")]
        if self.decisions:
            n = sum(len(a) for fields in self.decisions.forms.values() for a in fields.values())
            out.append(f"fitted decisions: {self.decisions.status}, {n} held-out fields of "
                       f"{', '.join(sorted(self.decisions.forms))}"
                       + (f" ({self.decisions.fitted_on})" if self.decisions.fitted_on else ""))
        else:
            out.append("fitted decisions: none (thresholds from the layout, else the default)")
        return out


def _status(fitted_for, weights: str) -> str:
    return FITTED if fitted_for == weights else INHERITED


def load_bundle(path) -> Bundle:
    """Load the model bundle at ``path`` (a model file), checking everything it carries.

    Raises
    ------
    ModelFileError("<file>: <problem>")
    """
    path = Path(path)
    nets, header = load_networks(path)
    labels = tuple(header.get("labels") or ())
    if len(labels) != 10 or labels != tuple(str(d) for d in range(10)):
        raise ModelFileError(f"{path}: not a digit model (labels {', '.join(labels)[:60]}; formread reads 0-9)")
    inp = header.get("input") or {}
    if int(inp.get("size", 28)) != 28:
        raise ModelFileError(f"{path}: made for {inp.get('size')}x{inp.get('size')} images; formread's digits "
                             "are 28x28")
    weights = str(header.get("weights_sha256") or header.get("sha256"))
    dec = header.get("decoder")
    if dec is None:   # format version 1: the constants of the first shipped network
        decoder, fitted_for, fitted_on = _SHIPPED_DECODER, SHIPPED_WEIGHTS_SHA256, "the shipped development cards"
        status = FITTED if networks_sha256(nets) == SHIPPED_WEIGHTS_SHA256 else SHIPPED_CONSTANTS
    else:
        if not isinstance(dec, dict):
            raise ModelFileError(f"{path}: damaged model file ('decoder' must be a table)")
        fitted_for, fitted_on = str(dec.get("fitted_for")), str(dec.get("fitted_on") or "")
        decoder, status = _decoder_from_json(path, dec.get("constants")), _status(fitted_for, weights)
    decisions = Decisions()
    raw = header.get("decisions")
    if raw:
        if not isinstance(raw, dict) or not isinstance(raw.get("forms"), dict):
            raise ModelFileError(f"{path}: damaged model file ('decisions' must be a table of forms)")
        forms = {}
        for form, d in raw["forms"].items():
            fields = d.get("fields") if isinstance(d, dict) else None
            if not isinstance(fields, dict):
                raise ModelFileError(f"{path}: damaged model file (decisions of form {form[:40]!r})")
            forms[str(form)] = {str(n): _evidence(path, rows) for n, rows in fields.items()}
        decisions = Decisions(forms, _status(raw.get("fitted_for"), weights), str(raw.get("fitted_on") or ""),
                              str(raw.get("fitted_for")))
    t = float(header.get("temperature", 1.0))
    if not math.isfinite(t) or t <= 0:
        raise ModelFileError(f"{path}: damaged model file (temperature {t!r})")
    return Bundle(path, tuple(nets), t, labels, decoder, status, decisions, header, fitted_for, fitted_on)


def save_bundle(path, networks, header: dict, *, decoder: ConfidenceModel, decoder_fitted_for: str | None = None,
                decoder_fitted_on: str = "", decisions: Decisions | None = None,
                decisions_fitted_for: str | None = None) -> Bundle:
    """Write a model bundle and return it as loaded.

    ``decoder_fitted_for`` / ``decisions_fitted_for``: the ``weights_sha256`` of the networks they
    were fitted for; None means these very ``networks`` (fitted); the parent's sha keeps them
    inherited.  ``header``: training provenance, metrics and temperature (formread.nn.modelfile).
    """
    nets = [networks] if isinstance(networks, Sequential) else list(networks)
    own = networks_sha256(nets)
    full = dict(header)
    full["decoder"] = {"constants": _decoder_to_json(decoder), "fitted_for": decoder_fitted_for or own,
                       "fitted_on": decoder_fitted_on}
    if decisions:
        full["decisions"] = decisions.to_json(decisions_fitted_for or own)
    else:
        full.pop("decisions", None)
    save_networks(path, nets, full)
    return load_bundle(path)
