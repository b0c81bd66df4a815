"""Commands of the train group: ``train``, ``evaluate`` and ``info``."""

from __future__ import annotations

import json
import shlex
from pathlib import Path
from typing import Optional

import typer

from .common import EXIT_INTERRUPTED, ProgressBar, edge


def register(app: typer.Typer) -> None:
    """Add this group's commands to the main app."""
    app.command("train")(train_cmd)
    app.command("evaluate")(evaluate_cmd)
    app.command("info")(info_cmd)


def _train_command(out: Path, dataset: str, arch: str, cfg, seed: int) -> str:
    """The full ``formread train`` command that reproduces a run (every setting spelled out)."""
    a = cfg.augment
    args = ["formread", "train", "--dataset", dataset, "--arch", arch, "--epochs", str(cfg.epochs),
            "--batch-size", str(cfg.batch_size), "--optimizer", cfg.optimizer, "--lr", f"{cfg.lr:g}",
            "--schedule", cfg.schedule, "--weight-decay", f"{cfg.weight_decay:g}",
            "--label-smoothing", f"{cfg.label_smoothing:g}", "--val-fraction", f"{cfg.val_fraction:g}",
            "--patience", str(cfg.patience), "--affine" if a.affine else "--no-affine",
            "--elastic" if a.elastic else "--no-elastic", "--elastic-alpha", f"{a.elastic_alpha:g}",
            "--elastic-sigma", f"{a.elastic_sigma:g}", "--seed", str(seed)]
    if cfg.workers != 1:
        args += ["--workers", str(cfg.workers)]
    args += ["--out", str(out)]
    return " ".join(shlex.quote(x) for x in args)


class _EpochBars:
    """One ProgressBar line per epoch, fed by the training loop's progress callback."""

    def __init__(self, enabled: bool):
        self.enabled, self.bar, self.epoch = enabled, None, None

    def __call__(self, done: int, total: int, **figures) -> None:
        epoch = figures.pop("epoch", None)
        epochs = figures.pop("epochs", None)
        if epoch != self.epoch or self.bar is None:
            self.epoch = epoch
            width = len(str(epochs))
            self.bar = ProgressBar(f"epoch {epoch:>{width}}/{epochs}", enabled=self.enabled)
        self.bar(done, total, **figures)


@edge
def train_cmd(
    out: Path = typer.Option(..., "--out", "-o", help="Model file to write (.npz)."),
    dataset: str = typer.Option("default", "--dataset", "-d",
                                help="Training data: default, mnist, digits, samples:DIR or npz:FILE."),
    arch: str = typer.Option("wide", "--arch", help="Architecture: lenet5, lenet5-classic or wide."),
    epochs: int = typer.Option(50, "--epochs", "-e", help="Most epochs (early stopping may end sooner)."),
    batch_size: int = typer.Option(64, "--batch-size", help="Images per mini-batch."),
    optimizer: str = typer.Option("adam", "--optimizer", help="adam or sgd."),
    lr: float = typer.Option(2e-3, "--lr", help="Base learning rate."),
    schedule: str = typer.Option("cosine", "--schedule", help="constant, step or cosine."),
    weight_decay: float = typer.Option(0.0, "--weight-decay", help="Weight decay on weights (not biases)."),
    label_smoothing: float = typer.Option(0.1, "--label-smoothing", help="Label smoothing share."),
    val_fraction: float = typer.Option(0.1, "--val-fraction",
                                       help="Share held back for early stopping and the temperature."),
    patience: int = typer.Option(12, "--patience", help="Epochs without progress before stopping (0: never)."),
    affine: bool = typer.Option(True, "--affine/--no-affine", help="Random rotation, scale, shear, shift."),
    elastic: bool = typer.Option(True, "--elastic/--no-elastic", help="Elastic distortion (Simard et al. 2003)."),
    elastic_alpha: float = typer.Option(24.0, "--elastic-alpha",
                                        help="Scale of the elastic displacement (pixels)."),
    elastic_sigma: float = typer.Option(4.0, "--elastic-sigma", help="Smoothing of the elastic displacement."),
    seed: int = typer.Option(0, "--seed", help="Seeds the weights, split, shuffling and augmentation."),
    workers: int = typer.Option(1, "--workers", "-w",
                                help="1, or 2 to split each batch over two processes "
                                     "(pays on an idle 2-core machine)."),
    checkpoint: Optional[Path] = typer.Option(None, "--checkpoint",
                                              help="Checkpoint file (default: OUT with .ckpt appended)."),
    resume: bool = typer.Option(False, "--resume", help="Continue the run saved in the checkpoint."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="No progress bars."),
):
    """Train a digit model and write it to OUT with its held-out figures and temperature.

    The defaults are the recipe of the shipped model (models/MODEL_CARD.md).

    Ctrl-C stops training, keeps the best weights so far in OUT and exits with 130;
    the same command with --resume continues from the checkpoint.
    """
    import numpy as np

    from ..nn.augment import AugmentConfig
    from ..nn.model import ARCHITECTURES, build_model
    from ..nn.modelfile import save_model
    from ..learn.datasets import held_out_parts, load_named
    from ..nn.train import TrainConfig, evaluate, train
    from ..errors import check_param

    check_param(arch in ARCHITECTURES, "arch", f"one of {', '.join(sorted(ARCHITECTURES))}", arch)
    cfg = TrainConfig(
        epochs=epochs, batch_size=batch_size, optimizer=optimizer, lr=lr, schedule=schedule,
        weight_decay=weight_decay, label_smoothing=label_smoothing, val_fraction=val_fraction,
        patience=patience, seed=seed, workers=workers,
        augment=AugmentConfig(affine=affine, elastic=elastic, elastic_alpha=elastic_alpha,
                              elastic_sigma=elastic_sigma),
    )
    cfg.validate()
    data = load_named(dataset, "train")
    model = build_model(arch, np.random.default_rng(seed))
    ckpt = checkpoint or out.with_name(out.name + ".ckpt")
    if not quiet:
        typer.echo(f"training {arch} on {data.name} ({len(data)} images, {val_fraction:.0%} held back "
                   f"for validation), seed {seed}", err=True)
    result = train(model, data.x, data.y, cfg, progress=_EpochBars(not quiet), checkpoint=ckpt, resume=resume)

    def finite(v):  # JSON has no NaN: a figure that does not exist (no validation split) is null
        return None if v != v else v

    metrics = {"validation": {"n": int(len(result.val_indices)), "accuracy": finite(result.val_accuracy),
                              "loss": finite(result.best_val_loss), "ece_raw": finite(result.ece_val_raw),
                              "ece": finite(result.ece_val_calibrated)}}
    for part in held_out_parts(dataset):
        held = load_named(*part.split(":"))
        ev = evaluate(model, held.x, held.y, result.temperature)
        metrics[part] = {k: ev[k] for k in ("n", "accuracy", "ece_raw", "ece", "nll_raw", "nll")}
    header = {
        "training": {
            "dataset": data.name, "n_images": int(len(data)), "n_train": int(len(result.train_indices)),
            "n_validation": int(len(result.val_indices)),
            "split": f"stratified {cfg.val_fraction:g} of each class held back for validation (seed {seed})",
            "held_out": held_out_parts(dataset), "architecture_name": arch, "config": cfg.as_dict(),
            "epochs_run": result.epochs_run, "best_epoch": result.best_epoch,
            "stopped_early": result.stopped_early, "interrupted": result.interrupted,
            "seconds": round(result.seconds, 1),
            "command": _train_command(out, dataset, arch, cfg, seed),
        },
        "seed": seed,
        "metrics": metrics,
        "temperature": result.temperature,
    }
    save_model(out, model, header)
    for part, m in metrics.items():
        if part != "validation":
            typer.echo(f"{part}: accuracy {m['accuracy']:.4f}  ECE {m['ece_raw']:.4f} -> {m['ece']:.4f} "
                       f"(temperature {result.temperature:.3f})")
    if len(result.val_indices):
        typer.echo(f"validation: accuracy {result.val_accuracy:.4f} (best epoch {result.best_epoch} "
                   f"of {result.epochs_run})")
    typer.echo(f"trained {result.epochs_run} epochs in {result.seconds:.0f} s")
    typer.echo(f"wrote {out}")
    if result.interrupted:
        typer.echo(f"formread: interrupted; best weights so far saved to {out}; "
                   f"resume with the same command and --resume", err=True)
        raise typer.Exit(EXIT_INTERRUPTED)
    if ckpt.exists():
        ckpt.unlink()


def _render_report(name: str, rep: dict) -> str:
    lines = [
        f"dataset: {name}  ({rep['n']} images)",
        f"accuracy: {rep['accuracy']:.4f}",
        f"expected calibration error (15 bins): {rep['ece_raw']:.4f} raw, {rep['ece']:.4f} at temperature "
        f"{rep['temperature']:.3f}",
        "",
        "class  precision  recall",
    ]
    for c, (p, r) in enumerate(zip(rep["precision"], rep["recall"])):
        lines.append(f"{c:>5}  {p:9.4f}  {r:6.4f}")
    lines += ["", "confusion (rows: true class, columns: predicted)",
              "      " + "".join(f"{c:>5}" for c in range(len(rep["confusion"])))]
    for c, row in enumerate(rep["confusion"]):
        lines.append(f"{c:>5} " + "".join(f"{v:>5}" for v in row))
    return "\n".join(lines)


@edge
def evaluate_cmd(
    model_path: Path = typer.Argument(..., metavar="MODEL", help="Model file (.npz)."),
    dataset: str = typer.Option("default", "--dataset", "-d",
                                help="default, mnist, digits, samples:DIR or npz:FILE."),
    part: str = typer.Option("test", "--part", help="train, test or all."),
    as_json: bool = typer.Option(False, "--json", help="Machine-readable output."),
):
    """Accuracy, per-class precision and recall, confusion matrix and calibration of MODEL."""
    from ..nn.modelfile import load_model
    from ..learn.datasets import load_named
    from ..nn.train import evaluate

    model, header = load_model(model_path)
    data = load_named(dataset, part)
    rep = evaluate(model, data.x, data.y, float(header.get("temperature", 1.0)))
    rep["dataset"] = data.name
    rep["model"] = str(model_path)
    if as_json:
        typer.echo(json.dumps(rep, indent=2))
    else:
        typer.echo(_render_report(data.name, rep))


def _arch_summary(spec: list) -> str:
    parts = []
    for e in spec:
        t = e.get("type")
        if t == "conv2d":
            parts.append(f"conv {e.get('kernel')}x{e.get('kernel')}x{e.get('out')}")
        elif t == "dense":
            parts.append(f"dense {e.get('out')}")
        elif t in ("maxpool", "avgpool"):
            parts.append(f"{t[:3]}pool {e.get('size', 2)}")
        elif t == "dropout":
            parts.append(f"dropout {e.get('p')}")
        else:
            parts.append(str(t))
    return " > ".join(parts)


def _fmt(v) -> str:
    return f"{v:.4f}" if isinstance(v, float) else str(v)


def render_card(path: Path, header: dict, n_params: int | None = None) -> str:
    """A model header as a readable card (text)."""
    tr = header.get("training") or {}
    inp = header.get("input") or {}
    lines = [
        f"model:        {path}",
        f"architecture: {tr.get('architecture_name', '-')}: {_arch_summary(header.get('architecture', []))}",
    ]
    if n_params is not None:
        lines.append(f"parameters:   {n_params:,}")
    lines += [
        f"input:        {inp.get('size')}x{inp.get('size')}, {inp.get('channels')} channel, "
        f"normalisation {inp.get('normalisation')}",
        f"labels:       {' '.join(map(str, header.get('labels', [])))}",
    ]
    if tr:
        lines.append(f"trained on:   {tr.get('dataset', '-')} ({tr.get('n_train', '?')} images for training, "
                     f"{tr.get('n_validation', '?')} for validation)")
        if tr.get("split"):
            lines.append(f"split:        {tr['split']}")
        if tr.get("held_out"):
            lines.append(f"held out:     {', '.join(tr['held_out'])} (never trained on)")
        if "epochs_run" in tr:
            lines.append(f"epochs:       {tr['epochs_run']} run, best {tr.get('best_epoch')}"
                         + (" (interrupted)" if tr.get("interrupted") else "")
                         + (f", {tr['seconds']:.0f} s" if isinstance(tr.get("seconds"), (int, float)) else ""))
        if tr.get("command"):
            lines.append(f"command:      {tr['command']}")
    lines.append(f"seed:         {header.get('seed')}")
    metrics = header.get("metrics") or {}
    if metrics:
        lines.append("metrics:")
        for part, m in metrics.items():
            if isinstance(m, dict):
                figs = "  ".join(f"{k} {_fmt(m[k])}" for k in ("n", "accuracy", "ece_raw", "ece") if k in m)
                lines.append(f"  {part:<12} {figs}")
            else:
                lines.append(f"  {part:<12} {_fmt(m)}")
    lines += [
        f"temperature:  {float(header.get('temperature', 1.0)):.4f}",
        f"created:      {header.get('created')}",
        f"sha256:       {header.get('sha256')}",
    ]
    return "\n".join(lines)


def list_models() -> list[tuple[Path, dict | None, str | None]]:
    """Model files in the models folder: (path, header or None, problem or None), by name."""
    from ..errors import FormreadError
    from ..nn.modelfile import read_header
    from ..paths import models_dir

    out = []
    d = models_dir()
    for p in sorted(d.glob("*.npz")) if d.is_dir() else []:
        try:
            out.append((p, read_header(p), None))
        except FormreadError as e:
            out.append((p, None, str(e).splitlines()[0]))
    return out


@edge
def info_cmd(
    model_path: Optional[Path] = typer.Argument(None, metavar="[MODEL]",
                                                help="Model file; without it, list the model files."),
    as_json: bool = typer.Option(False, "--json", help="Print the raw header as JSON."),
):
    """Show a model file's card (architecture, data, split, metrics, temperature, checksum),
    or list the model files and mark the one in use."""
    from ..nn.modelfile import load_model
    from ..paths import default_model_path, models_dir

    if model_path is not None:
        model, header = load_model(model_path)  # verifies the checksum
        if as_json:
            typer.echo(json.dumps(header, indent=2, sort_keys=True))
            return
        n = sum(int(p.value.size) for p in model.parameters())
        typer.echo(render_card(model_path, header, n))
        typer.echo("checksum:     verified")
        return
    in_use = default_model_path().resolve()
    rows = list_models()
    if as_json:
        listing = [{"file": p.name, "in_use": p.resolve() == in_use, "created": (h or {}).get("created"),
                    "metrics": (h or {}).get("metrics"), "problem": err} for p, h, err in rows]
        typer.echo(json.dumps(listing, indent=2))
        return
    if not rows:
        typer.echo(f"no model files in {models_dir()}")
        return
    typer.echo(f"model files in {models_dir()} (* = in use):")
    for p, h, err in rows:
        mark = "*" if p.resolve() == in_use else " "
        if h is None:
            typer.echo(f"{mark} {p.name:<24} unreadable: {err}")
            continue
        accs = "  ".join(f"{k} {v['accuracy']:.4f}" for k, v in (h.get("metrics") or {}).items()
                         if isinstance(v, dict) and k != "validation" and "accuracy" in v)
        typer.echo(f"{mark} {p.name:<24} {str(h.get('created') or '-'):<26} {accs}")
    if not in_use.exists():
        typer.echo(f"the model in use ({in_use.name}) is missing")
