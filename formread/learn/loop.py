"""``formread learn``: the whole step after a review, learning the digits AND the decisions.

Why both: a network retrained on an office's handwriting reads it better, but its confidences
change with it; decisions fitted for the old network (the decoder's digit reliability map, the
thresholds) then send the same share of fields to review, and the gain never reaches the clerk.
So one step, from reviewed runs:

1. **Gather** every field of the runs whose true value is known: decided by a clerk (confirmed,
   corrected, blank on paper, including the spot checks), or accepted by the reader without a
   spot check (taken as read: their error is what the spot checks estimate, typically well under
   1%).  Fields still waiting, or marked unreadable, are left out.
2. **Split by page**, seeded, into fitting pages and held-out pages (``held_out`` of them): no
   page's digits are both learnt from and measured on.
3. **Digit samples** from the fitting pages' clerk-decided fields.  A field whose reading had
   another digit count than the decided value is cut again to that count (the stored candidate
   splits, else the stored crop cut anew), so touching and broken digits are learnt too.
4. **Fine-tune** the network in use (formread.learn.finetune: original data mixed in, the
   parent's geometric augmentation, a fresh temperature), its original held-out parts measured
   before and after.
5. **Refit the decisions for the new network** on the held-out pages, read again with it (every
   stored candidate split): the digit reliability map of the decoder, and the evidence
   (confidence, right or wrong, eligible) from which a threshold for any target error is chosen
   (formread.read.bundle.Decisions), per form.
6. **Promote** the new bundle only when, on the held-out pages, its review rate at the target
   error falls below the old bundle's (whose threshold is chosen the same way on the same pages)
   and no original held-out part loses more than ``margin``.  The bundle in use is never
   overwritten: the new one is a new version beside it.
7. **Otherwise keep the network, refit its decisions** when that pays: the decisions in use were
   fitted elsewhere (the shipped ones on development cards) and may let more errors through on
   this office's forms than its target allows.  Decisions fitted on the fitting pages are compared
   with those in use on the held-out pages; when they review less without more error, or cut an
   error above the target, the same network with decisions fitted on every page is promoted.

The next ``formread read`` then uses the promoted bundle and its fitted decisions for every form it
learnt, as soon as the layout names a ``target_error`` (or no threshold of its own): the layout
files stay the clerk's.
"""

from __future__ import annotations

import dataclasses
import math
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path, PurePath
from typing import Any

import numpy as np

from ..errors import DataError, LedgerError, check_param
from ..form.thresholds import DEFAULT_TARGET, check_target, resolve_thresholds
from ..imaging.fields import FieldCrop
from ..imaging.segment import Candidate, FieldDigits, segment_field
from ..ledger.fieldfile import FieldFile, load_field_file
from ..ledger.store import open_ledger
from ..read.bundle import Bundle, Decisions, load_bundle, save_bundle
from ..read.decode import ConfidenceModel, decode_page
from ..read.recognise import recognise_pages
from ..read.runs import page_layout, run_layouts
from ..read.score import load_truth
from ..read.tune import choose_threshold, clopper_pearson_upper
from ..review.queries import resolve_inside
from ..store import in_use_path, next_version_path, promote, store_dir
from .finetune import accuracy, fine_tune, original_data

__all__ = ["LearnConfig", "LearnReport", "learn", "MIN_DECIDED_FIELDS", "MIN_DIGIT_CLASSES"]

MIN_DECIDED_FIELDS = 40
"""Fewer clerk-decided fields than this cannot teach a network anything measurable."""
MIN_DIGIT_CLASSES = 3
"""Local samples of fewer distinct digits would skew the network towards them."""
_CLERK = ("confirmed", "corrected", "empty")
_ELIGIBLE = (None, "low_confidence")
"""Reasons of fields a threshold decides (the others go to review whatever it is)."""


@dataclass
class LearnConfig:
    """Settings of one learning step (see the module docstring).

    Attributes
    ----------
    held_out : float in (0, 1)      share of the pages held out for measuring and refitting
    seed : int                      seeds the page split, the original-data sample and training
    epochs, lr, original_ratio      fine-tuning (formread.learn.finetune)
    margin : float                  most accuracy an original held-out part may lose for promotion
    target : float or None          error among accepted aimed at; None: each form's target_error,
                                    else formread.form.thresholds.DEFAULT_TARGET
    refit_only : bool               no training: refit the decoder's digit map and the fitted decisions
                                    of the bundle's own network on every page (a new form, a new
                                    network, or development sets)
    """

    held_out: float = 0.3
    seed: int = 0
    epochs: int = 6
    lr: float = 5e-4
    original_ratio: float = 4.0
    margin: float = 0.005
    target: float | None = None
    refit_only: bool = False

    def validate(self) -> None:
        check_param(isinstance(self.held_out, float) and 0.05 <= self.held_out <= 0.8, "held_out",
                    "a number in [0.05, 0.8]", self.held_out)
        check_param(isinstance(self.seed, int) and self.seed >= 0, "seed", "an integer >= 0", self.seed)
        check_param(isinstance(self.epochs, int) and 1 <= self.epochs <= 1000, "epochs", "an integer in 1..1000",
                    self.epochs)
        check_param(isinstance(self.lr, float) and math.isfinite(self.lr) and 0 < self.lr <= 1, "lr",
                    "a number in (0, 1]", self.lr)
        check_param(math.isfinite(self.original_ratio) and 0 < self.original_ratio <= 100, "original_ratio",
                    "a number in (0, 100]", self.original_ratio)
        check_param(math.isfinite(self.margin) and 0 <= self.margin < 1, "margin", "a number in [0, 1)",
                    self.margin)
        if self.target is not None:
            check_target(self.target, "target")


@dataclass
class _Field:
    """One field with a known true value, and what the reader stored of it."""

    run: int
    outdir: Path
    page: tuple                    # (outdir, content hash): the unit of the split
    form: str
    name: str
    truth: str
    clerk: bool                    # decided by a clerk (else: accepted, taken as read)
    reading: str | None
    file: FieldFile | None


@dataclass
class LearnReport:
    """Figures and outcome of one learning step (all "held-out" figures are on the held-out pages)."""

    bundle_before: str
    bundle_after: str | None = None
    promoted: bool = False
    reason: str = ""
    split: str = ""
    pages_fitting: int = 0
    pages_held_out: int = 0
    fields_known: int = 0
    fields_clerk: int = 0
    samples: int = 0
    samples_per_digit: list = field(default_factory=list)
    resegmented: int = 0
    skipped: list = field(default_factory=list)
    before: dict = field(default_factory=dict)
    after: dict = field(default_factory=dict)
    original_before: dict = field(default_factory=dict)
    original_after: dict = field(default_factory=dict)
    targets: dict = field(default_factory=dict)
    kept_network: dict = field(default_factory=dict)
    temperature: float = 1.0
    seconds: float = 0.0

    def as_dict(self) -> dict:
        return dataclasses.asdict(self)


# ------------------------------------------------------------------------------------------- gather

def _truth(row: dict) -> tuple[str | None, bool]:
    """(true value, decided by a clerk) of a field row, or (None, False) when it is not known."""
    st = row["final_status"]
    if st in _CLERK:
        return (row["final_value"] or ""), True
    if st == "auto" and not row["audit"]:
        return row["reading"], False
    return None, False


def _gather(runs: list[Path], truths=None) -> tuple[list[_Field], dict]:
    """Every field of the runs with a known true value; and ``{form name: Layout}``.

    ``truths``: None, or one truth.jsonl (formread.read.score) per run, in order, or None for a run;
    a truth file's values are the truth of every field it names, counted as a clerk's (development
    sets, whose every value is known)."""
    fields: list[_Field] = []
    layouts: dict = {}
    truths = list(truths) if truths is not None else [None] * len(runs)
    if len(truths) != len(runs):
        raise DataError(f"{len(truths)} truth files for {len(runs)} runs: give one per run, in order")
    for outdir, truth_file in zip(runs, truths):
        known = {} if truth_file is None else {(PurePath(t.source).name, t.page_number): t.fields
                                              for t in load_truth(truth_file)}
        with open_ledger(outdir, create=False) as led:
            by_run = run_layouts(led)
            rows = led.field_rows()
            hashes = {r["id"]: r["content_hash"] for r in led.conn.execute("SELECT id, content_hash FROM pages")}
        for r in rows:
            if r["page_status"] != "read":
                continue
            truth, clerk = _truth(r)
            given = known.get((PurePath(r["source"]).name, r["page_number"]), {}).get(r["name"])
            if given is not None:
                truth, clerk = given, True
            layout = page_layout(by_run, r["run_id"], r["form"])
            if truth is None or layout is None or r["name"] not in layout.field_names:
                continue
            layouts.setdefault(layout.name, layout)
            path = resolve_inside(outdir, r["digits_path"])
            try:
                ff = load_field_file(path) if path is not None else None
            except LedgerError:
                ff = None
            fields.append(_Field(r["run_id"], outdir, (str(outdir), hashes[r["page_id"]]), layout.name, r["name"],
                                 truth, clerk, r["reading"], ff))
    return fields, layouts


def _split(fields: list[_Field], share: float, seed: int) -> tuple[set, set]:
    """Pages (outdir, content hash) for fitting and held out, seeded; both non-empty."""
    pages = sorted({f.page for f in fields})
    if len(pages) < 4:
        raise DataError(f"only {len(pages)} pages with decided fields; learning needs at least 4 (some to learn "
                        "from, some to measure on)")
    order = np.random.default_rng(seed).permutation(len(pages))
    n_hold = min(len(pages) - 1, max(1, int(round(share * len(pages)))))
    held = {pages[i] for i in order[:n_hold]}
    return set(pages) - held, held


# ------------------------------------------------------------------------------------------- samples

def _field_digits(f: _Field, spec) -> FieldDigits | None:
    """The stored segmentation of a field as imaging's FieldDigits (every candidate), or None."""
    ff = f.file
    if ff is None or ff.cand_digits is None:
        return None
    cands = [Candidate(d, [], c) for d, c in ff.candidates()]
    blank = ff.blank if spec.kind == "boxed" and ff.blank is not None and len(ff.blank) else None
    return FieldDigits(f.name, spec.kind, np.zeros((1, 1), np.uint8), cands, blank, ff.doubtful, ff.reason or None)


def _crop(ff: FieldFile, name: str, kind: str) -> FieldCrop:
    assert (ff.crop_geometry is not None and ff.crop_gray is not None and ff.crop_ink is not None
            and ff.crop_rect is not None and ff.crop_matrix is not None), \
        "a crop of a file written before schema version 2"
    x0, y0, ppm = (float(v) for v in ff.crop_geometry)
    return FieldCrop(name, kind, ff.crop_gray, ff.crop_ink, ppm, x0, y0, tuple(float(v) for v in ff.crop_rect),
                     ff.crop_matrix)


def _digits_for(f: _Field, spec) -> tuple[np.ndarray | None, str, bool]:
    """The digit images of the decided value: ((K, 1, 28, 28) float32 or None, why none, cut again?)."""
    k = len(f.truth)
    ff = f.file
    if ff is None:
        return None, "no digit file stored", False
    if len(ff.digits) == k:
        return ff.digits, "", False
    if ff.cand_digits is None:
        return None, f"{len(ff.digits)} digit images for a {k}-digit value (file of the first release)", False
    blank = ff.blank if spec.kind == "boxed" and ff.blank is not None and len(ff.blank) else None
    options = []
    for d, cost in ff.candidates():
        rows = np.arange(len(d)) if blank is None else np.flatnonzero(~blank)
        if blank is not None and len(rows) != k and len(d) == k:
            rows = np.arange(k)                  # a boxed field whose every cell holds one digit
        if len(rows) == k:
            options.append((cost, d[rows]))
    if options:
        return min(options, key=lambda t: t[0])[1], "", True
    if spec.kind == "open" and ff.crop_gray is not None:
        cut = segment_field(_crop(ff, f.name, spec.kind), spec)
        same = [c for c in cut.candidates if len(c.digits) == k]
        if same:
            return same[0].digits, "", True
    return None, f"no split of the field into {k} digits", False


def _samples(fields: list[_Field], layouts: dict, report: LearnReport) -> tuple[np.ndarray, np.ndarray]:
    xs, ys = [], []
    for f in fields:
        if not f.clerk or not f.truth or not f.truth.isdigit():
            continue
        spec = layouts[f.form].field(f.name)
        d, why, cut = _digits_for(f, spec)
        if d is None:
            report.skipped.append(f"{f.outdir} run {f.run} {f.name}: {why}")
            continue
        report.resegmented += cut
        xs.append(d)
        ys += [int(c) for c in f.truth]
    if not xs:
        return np.zeros((0, 1, 28, 28), np.float32), np.zeros(0, np.int64)
    return np.concatenate(xs).astype(np.float32), np.asarray(ys, np.int64)


# ------------------------------------------------------------------------------------------- re-reading

def _read_again(fields: list[_Field], layouts: dict, bundle: Bundle, decoder: ConfidenceModel) -> list[tuple]:
    """Every held-out field read again by ``bundle`` with ``decoder``: (field, FieldReading) pairs."""
    pages: dict = {}
    for f in fields:
        pages.setdefault((f.page, f.form), []).append(f)
    keys = list(pages)
    fds = []
    for key in keys:
        layout = layouts[key[1]]
        fds.append({f.name: fd for f in pages[key] if (fd := _field_digits(f, layout.field(f.name))) is not None})
    evidence = recognise_pages(fds, bundle)
    out = []
    for key, ev in zip(keys, evidence):
        layout = layouts[key[1]]
        thresholds = resolve_thresholds(layout, explicit=1.0)     # the decision at threshold 1 is not used
        readings = decode_page(ev, layout, confidence=decoder, thresholds=thresholds)
        out += [(f, readings[f.name]) for f in pages[key] if f.name in ev]
    return out


def _evidence(pairs: list[tuple]) -> dict:
    """{form: {field: ndarray (N, 3) of confidence, correct, eligible}}."""
    out: dict = {}
    for f, r in pairs:
        eligible = r.reason in _ELIGIBLE
        out.setdefault(f.form, {}).setdefault(f.name, []).append(
            (float(r.confidence), float(r.reading == f.truth), float(eligible)))
    return {form: {n: np.asarray(v, np.float64) for n, v in fields.items()} for form, fields in out.items()}


def _figures(evidence: dict, targets: dict) -> dict:
    """Field accuracy, and per form the review rate and error among accepted at the threshold its
    target gives on this evidence (one-sided 95% Clopper-Pearson bound beside)."""
    allrows = [a for fields in evidence.values() for a in fields.values()]
    every = np.concatenate(allrows) if allrows else np.zeros((0, 3))
    out: dict[str, Any] = {"fields": int(len(every)),
                           "field_accuracy": float(every[:, 1].mean()) if len(every) else None, "forms": {}}
    reviewed = accepted = wrong = 0
    for form, fields in evidence.items():
        ev = np.concatenate(list(fields.values()))
        res = choose_threshold(ev[:, 0], ev[:, 1] > 0.5, ev[:, 2] > 0.5, target=targets[form], criterion="calibrated")
        out["forms"][form] = {"threshold": res.threshold if res.met else None, "review_rate": res.review_rate,
                              "error_among_accepted": res.error_among_accepted, "accepted": res.accepted,
                              "wrong_accepted": res.wrong_accepted, "upper_95": res.upper_bound,
                              "target": targets[form], "met": res.met}
        reviewed += res.fields - res.accepted
        accepted += res.accepted
        wrong += res.wrong_accepted
    n = reviewed + accepted
    out.update(review_rate=reviewed / n if n else None, error_among_accepted=wrong / accepted if accepted else None,
               wrong_accepted=wrong, accepted=accepted,
               upper_95=clopper_pearson_upper(wrong, accepted) if accepted else None)
    return out


# ------------------------------------------------------------------------------------------- refit

_KNOTS = np.array([-7.0, -5.0, -4.25, -3.25, -2.75, -2.25, -1.75, -1.25, -0.75, -0.25])
_PRIOR_DIGITS = 20.0
"""Pseudo-digits of the old map's rate in each band: with few local digits the map moves little."""


def refit_digit_map(decoder: ConfidenceModel, probs: np.ndarray, correct: np.ndarray) -> ConfidenceModel:
    """The decoder with its digit reliability map refitted on digits of known truth.

    Per band of ``log10(1 - max p)`` (the map's knots), the share of misread digits, shrunk towards
    the old map's rate by :data:`_PRIOR_DIGITS` pseudo-digits, then made nondecreasing (a digit read
    less surely is never more reliable).

    Parameters
    ----------
    probs : ndarray of shape (N, 10), float: calibrated probabilities (temperature applied)
    correct : ndarray of shape (N,), bool: argmax equals the true digit
    """
    if len(probs) == 0:
        return decoder
    e = np.clip(1.0 - probs.max(axis=1), 1e-15, 0.9)
    le = np.log10(e)
    old = decoder.digit_calibration
    old_rate = (10.0 ** np.interp(_KNOTS, np.asarray(old)[:, 0], np.asarray(old)[:, 1]) if old is not None
                else 10.0 ** _KNOTS)
    edges = np.concatenate([[-np.inf], (_KNOTS[1:] + _KNOTS[:-1]) / 2, [np.inf]])
    band = np.clip(np.searchsorted(edges, le, side="right") - 1, 0, len(_KNOTS) - 1)
    n = np.bincount(band, minlength=len(_KNOTS)).astype(np.float64)
    wrong = np.bincount(band, weights=(~correct).astype(np.float64), minlength=len(_KNOTS))
    rate = (wrong + _PRIOR_DIGITS * old_rate) / (n + _PRIOR_DIGITS)
    rate = np.maximum.accumulate(np.clip(rate, 1e-6, 0.9))
    knots = tuple((float(k), float(np.log10(r))) for k, r in zip(_KNOTS, rate))
    return dataclasses.replace(decoder, digit_calibration=knots)


def _digit_evidence(pairs: list[tuple], layouts: dict, bundle: Bundle) -> tuple[np.ndarray, np.ndarray]:
    """Calibrated probabilities and correctness of every held-out digit whose reading has the truth's length."""
    xs, ys = [], []
    for f, r in pairs:
        if (f.file is None or not f.truth or not f.truth.isdigit() or r.reading is None
                or len(r.reading) != len(f.truth)):
            continue
        fd = _field_digits(f, layouts[f.form].field(f.name))
        if fd is None or r.candidate is None:
            continue
        d = fd.candidates[r.candidate].digits[r.positions]
        xs.append(d)
        ys += [int(c) for c in f.truth]
    if not xs:
        return np.zeros((0, 10)), np.zeros(0, bool)
    p = bundle.predict_proba(np.concatenate(xs))
    return p, p.argmax(axis=1) == np.asarray(ys)


# ------------------------------------------------------------------------------------------- the step

def learn(runs, *, bundle=None, out=None, config: LearnConfig | None = None, progress: Callable | None = None,
          resume: bool = False, truth=None) -> LearnReport:
    """Learn from reviewed runs (output folders of ``formread read``): see the module docstring.

    Parameters
    ----------
    runs : paths of output folders
    bundle : the model bundle in use (Bundle or path); default: the one in use
    out : path of the new version; default: the next ``-r<N>.npz`` of the store
    progress : ``progress(done, total, stage=...)`` (fine-tuning: per batch and epoch)
    resume : continue an interrupted fine-tuning from its checkpoint (``out`` + ``.ckpt``)
    truth : None, or one truth.jsonl per run (in order): known values of the fields they name
        (development sets)

    Raises
    ------
    DataError (too few decided fields or pages, a single digit class), LedgerError, ModelFileError,
    ParameterError
    """
    t0 = time.monotonic()
    cfg = config or LearnConfig()
    cfg.validate()
    runs = [Path(r) for r in runs]
    if not runs:
        raise DataError("no run to learn from")
    if not isinstance(bundle, Bundle):
        bundle = load_bundle(bundle if bundle is not None else in_use_path())
    if len(bundle.networks) != 1 and not cfg.refit_only:
        raise DataError(f"{bundle.path}: holds {len(bundle.networks)} networks; learning fine-tunes one "
                        "(--refit-only refits the decisions of several)")
    rep = LearnReport(bundle_before=str(bundle.path))
    fields, layouts = _gather(runs, truth)
    rep.fields_known = len(fields)
    rep.fields_clerk = sum(f.clerk for f in fields)
    if rep.fields_clerk < MIN_DECIDED_FIELDS:
        raise DataError(f"{', '.join(map(str, runs))}: only {rep.fields_clerk} fields decided by a clerk; learning "
                        f"needs at least {MIN_DECIDED_FIELDS} (review more fields first)")
    targets = {form: (cfg.target if cfg.target is not None else
                      (layout.target_error if layout.target_error is not None else DEFAULT_TARGET))
               for form, layout in layouts.items()}
    rep.targets = targets
    if cfg.refit_only:
        return _refit_only(bundle, fields, layouts, targets, rep, out, runs, cfg, t0)
    fit_pages, held_pages = _split(fields, cfg.held_out, cfg.seed)
    rep.pages_fitting, rep.pages_held_out = len(fit_pages), len(held_pages)
    rep.split = (f"{len(held_pages)} of {len(fit_pages) + len(held_pages)} pages held out (share {cfg.held_out:g}, "
                 f"seed {cfg.seed}); digits learnt from the other pages only")
    fitting = [f for f in fields if f.page in fit_pages]
    held = [f for f in fields if f.page in held_pages]
    x, y = _samples(fitting, layouts, rep)
    rep.samples = int(len(y))
    rep.samples_per_digit = np.bincount(y, minlength=10).tolist()
    if len(np.unique(y)) < MIN_DIGIT_CLASSES:
        raise DataError(f"{', '.join(map(str, runs))}: the decided fields hold only digits "
                        f"{', '.join(map(str, np.unique(y).tolist())) or 'none'}; learning needs at least "
                        f"{MIN_DIGIT_CLASSES} different digits")

    # the old bundle on the held-out pages, with its own decoder
    before_pairs = _read_again(held, layouts, bundle, bundle.decoder)
    rep.before = _figures(_evidence(before_pairs), targets)

    original, tests = original_data(bundle.header)
    net = bundle.networks[0]
    rep.original_before = {p: accuracy(net, d.x, d.y) for p, d in tests.items()}
    out = Path(out) if out is not None else next_version_path(bundle.path)
    if out.resolve() == bundle.path.resolve():
        raise DataError(f"{out}: the new version must not overwrite the bundle in use")
    ckpt = out.with_name(out.name + ".ckpt")
    tuned = fine_tune(net, bundle.header, x, y, original, epochs=cfg.epochs, lr=cfg.lr,
                      original_ratio=cfg.original_ratio, seed=cfg.seed, progress=progress, checkpoint=ckpt,
                      resume=resume)
    if tuned.result.interrupted:
        raise KeyboardInterrupt
    rep.temperature = float(tuned.result.temperature)
    rep.original_after = {p: accuracy(tuned.network, d.x, d.y) for p, d in tests.items()}

    # the new network on the held-out pages: refit the decoder's digit map, then the decisions
    draft = dataclasses.replace(bundle, networks=(tuned.network,), temperature=rep.temperature)   # in memory
    pairs = _read_again(held, layouts, draft, bundle.decoder)
    p, ok = _digit_evidence(pairs, layouts, draft)
    decoder = refit_digit_map(bundle.decoder, p, ok)
    pairs = _read_again(held, layouts, draft, decoder)
    evidence = _evidence(pairs)
    rep.after = _figures(evidence, targets)
    decisions = Decisions(evidence, fitted_on=f"{len(held_pages)} held-out pages of {len(runs)} run(s), "
                                               f"{rep.after['fields']} fields, seed {cfg.seed}")
    header = _header(bundle, tuned, rep, runs, cfg, digits=int(len(ok)))
    new = save_bundle(out, tuned.network, header, decoder=decoder,
                      decoder_fitted_on=f"{len(ok)} digits of {len(held_pages)} held-out pages", decisions=decisions)
    rep.bundle_after = str(new.path)
    if ckpt.exists():
        ckpt.unlink()

    drops = {k: rep.original_before[k] - rep.original_after[k] for k in tests}
    worst = max(drops.items(), key=lambda kv: kv[1]) if drops else (None, 0.0)
    rb, ra = rep.before["review_rate"], rep.after["review_rate"]
    if ra is None or rb is None or not ra < rb:
        rep.reason = (f"review rate at the target on the held-out pages did not fall "
                      f"({_pct(rb)} -> {_pct(ra)})")
    elif worst[0] is not None and worst[1] > cfg.margin:
        rep.reason = f"{worst[0]} accuracy fell by {worst[1]:.4f}, more than the margin {cfg.margin:.4f}"
    else:
        rep.promoted = True
        rep.reason = (f"review rate at the target on the held-out pages {_pct(rb)} -> {_pct(ra)}; original "
                      f"held-out parts within the margin {cfg.margin:.4f}")
        promote(new.path)
    if not rep.promoted:
        _keep_network(bundle, fitting, before_pairs, layouts, targets, rep, runs)
    rep.seconds = time.monotonic() - t0
    return rep


def _applied(pairs: list[tuple], layouts: dict, fitted_for: Callable) -> dict:
    """What thresholds resolved as ``formread read`` resolves them give on fields of known truth: review
    rate and error among accepted (spot checks left out: every eligible field at or above its threshold
    counts as accepted).  ``fitted_for(form)``: the ``fitted`` callable of the threshold policy."""
    thresholds = {form: resolve_thresholds(layout, fitted=fitted_for(form)) for form, layout in layouts.items()}
    n = accepted = wrong = 0
    for f, r in pairs:
        n += 1
        if r.reason in _ELIGIBLE and r.confidence >= thresholds[f.form][f.name].value:
            accepted += 1
            wrong += r.reading != f.truth
    return {"fields": n, "accepted": accepted, "wrong_accepted": wrong,
            "review_rate": 1 - accepted / n if n else None,
            "error_among_accepted": wrong / accepted if accepted else None,
            "upper_95": clopper_pearson_upper(wrong, accepted) if accepted else None}


def _keep_network(bundle: Bundle, fitting: list[_Field], held_pairs: list[tuple], layouts: dict, targets: dict,
                  rep: LearnReport, runs) -> None:
    """When the fine-tuned network is not promoted, the network in use may still need decisions fitted for
    these forms: its decisions were fitted elsewhere (the shipped ones on development cards).  Decisions
    fitted on the fitting pages are compared with those in use on the held-out pages (the network in use
    never trained on either); when they send fewer fields to review without more error, or cut an error
    above the target, the network in use is promoted again with decisions fitted on every page (a new
    version: the bundle in use is not overwritten)."""
    fit_pairs = _read_again(fitting, layouts, bundle, bundle.decoder)
    trial = Decisions(_evidence(fit_pairs))
    in_use = _applied(held_pairs, layouts, bundle.fitted_threshold)
    refit = _applied(held_pairs, layouts, lambda form: lambda t, n: trial.threshold_for(form, n, t))
    rep.kept_network = {"in_use": in_use, "refitted": refit}
    target = max(targets.values())
    e0, e1 = in_use["error_among_accepted"] or 0.0, refit["error_among_accepted"] or 0.0
    r0, r1 = in_use["review_rate"], refit["review_rate"]
    if r0 is None or r1 is None:
        return
    # less review without more error, or (the decisions in use missing the target here) less error
    better = (r1 < r0 and e1 <= e0) or (e0 > target and e1 < e0)
    if not better:
        return
    pages = {f.page for f, _ in fit_pairs + held_pairs}
    decisions = Decisions(_evidence(fit_pairs + held_pairs), fitted_on=f"{len(pages)} pages of {len(runs)} run(s), "
                                                                     f"the network in use kept")
    header = _provenance(bundle)
    out = next_version_path(bundle.path)
    kept = save_bundle(out, list(bundle.networks), header, decoder=bundle.decoder,
                       decoder_fitted_for=bundle.decoder_fitted_for, decoder_fitted_on=bundle.decoder_fitted_on,
                       decisions=decisions)
    promote(kept.path)
    rep.kept_network["fine_tuned_bundle"] = rep.bundle_after
    rep.promoted, rep.bundle_after = True, str(kept.path)
    rep.reason += (f"; the network in use kept, with decisions refitted on these pages (held-out pages: review "
                   f"{_pct(r0)} -> {_pct(r1)}, error among accepted {_pct(e0)} -> {_pct(e1)})")


def _refit_only(bundle: Bundle, fields, layouts, targets, rep: LearnReport, out, runs, cfg, t0) -> LearnReport:
    """The decoder's digit reliability map and the fitted decisions of the bundle's own network (or
    networks, averaged), from every page (no training)."""
    pairs = _read_again(fields, layouts, bundle, bundle.decoder)
    p, ok = _digit_evidence(pairs, layouts, bundle)
    decoder = refit_digit_map(bundle.decoder, p, ok)
    pairs = _read_again(fields, layouts, bundle, decoder)
    evidence = _evidence(pairs)
    rep.before = rep.after = _figures(evidence, targets)
    rep.pages_held_out = len({f.page for f in fields})
    rep.split = f"no training: all {rep.pages_held_out} pages used to fit the decisions"
    out = Path(out) if out is not None else next_version_path(bundle.path)
    if out.resolve() in (bundle.path.resolve(), in_use_path().resolve()):
        raise DataError(f"{out}: the new version must not overwrite the bundle in use")
    header = _provenance(bundle)
    decisions = Decisions(evidence, fitted_on=f"{rep.pages_held_out} pages of {len(runs)} run(s), "
                                               f"{rep.after['fields']} fields")
    new = save_bundle(out, list(bundle.networks), header, decoder=decoder,
                      decoder_fitted_on=f"digit map: {len(ok)} digits of {rep.pages_held_out} pages of {len(runs)} "
                                        f"run(s); other constants: {bundle.decoder_fitted_on or 'as shipped'}",
                      decisions=decisions)
    rep.bundle_after, rep.temperature = str(new.path), bundle.temperature
    rep.original_before = rep.original_after = {}
    if out.resolve().parent == store_dir().resolve():
        promote(new.path)
        rep.promoted, rep.reason = True, "the same network with decisions fitted on these pages"
    else:
        rep.reason = "written outside the model store; not put in use"
    rep.seconds = time.monotonic() - t0
    return rep


def _provenance(bundle: Bundle) -> dict:
    """The header parts a new version of the same networks carries over (what save_bundle rewrites left out)."""
    return {k: v for k, v in bundle.header.items()
            if k not in ("format", "format_version", "networks", "weights_sha256", "sha256", "created",
                         "architecture", "decoder", "decisions")}


def _pct(v) -> str:
    return "-" if v is None else f"{100 * v:.1f}%"


def _header(parent: Bundle, tuned, rep: LearnReport, runs, cfg: LearnConfig, digits: int) -> dict:
    res = tuned.result
    training = dict(parent.header.get("training") or {})
    training.pop("retrained", None)
    training["learned"] = {"parent": parent.path.name, "parent_sha256": parent.sha256,
                           "runs": [str(r) for r in runs], "split": rep.split, "samples": rep.samples,
                           "resegmented": rep.resegmented, "n_original": tuned.n_original,
                           "config": tuned.config.as_dict(), "learn": dataclasses.asdict(cfg),
                           "digits_refitted_on": digits, "held_out_before": rep.before, "held_out_after": rep.after}
    metrics = {p: {"accuracy": a} for p, a in rep.original_after.items()}
    metrics["validation"] = {"n": int(len(res.val_indices)), "accuracy": res.val_accuracy,
                             "ece_raw": res.ece_val_raw, "ece": res.ece_val_calibrated}
    return {"input": parent.header.get("input"), "labels": parent.header.get("labels"), "training": training,
            "seed": cfg.seed, "metrics": metrics, "temperature": float(res.temperature)}
