"""Training and inference speed of the pure-numpy network ("lenet5" on 28x28 inputs).

Prints images per second for training (batch 32, 64, 128; forward, loss, backward and an SGD
momentum step) and inference (batch 256), each with one process on one core and with two
processes via ``DataParallel`` (the better is the headline figure), and single-image latency;
FLOPs per image and the share of the machine's measured float32 matmul peak. When PyTorch is
importable, the same architecture, batch and thread count in PyTorch (``torch.set_num_threads``;
also one thread, for a per-core comparison), and the ratio numpy / PyTorch.

Each figure is the best of several short timing windows, and the windows of all figures (numpy
and PyTorch) are taken in turns, so that other work on a shared machine disturbs them alike.
``--json`` prints one JSON object:
{"numpy": {...}, "pytorch": {...} or null, "ratio": {"train_b64", "train_b128", "infer_b256"},
 "peak_gflops": g, "environment": {...}} (ratios null without PyTorch). The environment names the
CPU model, the BLAS library, its version and the kernel it chose, and the two OpenBLAS settings
that steer that choice (``OPENBLAS_CORETYPE``, ``OPENBLAS_L2_SIZE``) as this process saw them.

``--settings both`` runs the whole benchmark twice, each in a child process: once with the
environment as it is and once with those two variables removed (in the child only; nothing else
is changed), and prints both (``--json``: {"runs": [as_is, unset]}).

Usage: python benchmarks/train_speed.py [--json] [--seconds S] [--threads T] [--settings as-is|unset|both]
"""

from __future__ import annotations

import argparse
import contextlib
import json
import os
import platform
import subprocess
import sys
import time

import numpy as np
from threadpoolctl import threadpool_limits

from formread.nn.model import ARCHITECTURES, build_model
from formread.nn.optim import SGD
from formread.nn.parallel import DataParallel

ARCH = "lenet5"
TRAIN_BATCHES = (32, 64, 128)
INFER_BATCH = 256


OPENBLAS_SETTINGS = ("OPENBLAS_CORETYPE", "OPENBLAS_L2_SIZE")


def environment() -> dict:
    """What the figures depend on beyond the code: CPU, BLAS library and kernel, OpenBLAS settings."""
    from threadpoolctl import threadpool_info
    cpu = platform.processor() or platform.machine()
    try:
        with open("/proc/cpuinfo", encoding="utf-8", errors="replace") as f:
            cpu = next((ln.split(":", 1)[1].strip() for ln in f if ln.startswith("model name")), cpu)
    except OSError:
        pass
    blas = [{k: i.get(k) for k in ("internal_api", "version", "architecture", "threading_layer",
                                    "num_threads")} for i in threadpool_info() if i.get("user_api") == "blas"]
    return {"cpu_model": cpu, "cores": os.cpu_count(), "python": platform.python_version(),
            "numpy": np.__version__, "blas": blas,
            "settings": {k: os.environ.get(k) for k in OPENBLAS_SETTINGS}}


def run_settings(argv: list[str], which: list[str]) -> list[dict]:
    """Run this benchmark with --json in a child process per setting ("as-is" / "unset")."""
    runs = []
    for setting in which:
        env = dict(os.environ)
        if setting == "unset":
            for k in OPENBLAS_SETTINGS:
                env.pop(k, None)
        out = subprocess.run([sys.executable, __file__, *argv, "--json", "--settings", "as-is"],
                             env=env, check=True, capture_output=True, text=True).stdout
        res = json.loads(out)
        res["setting"] = setting
        runs.append(res)
    return runs


def best_rate(step, images_per_call: int, seconds: float, windows: int = 5,
              clock=time.perf_counter) -> float:
    """Best images/s over ``windows`` timing windows of seconds / windows each (after a warm-up).
    With ``clock=time.process_time``: images per CPU second of this process (less disturbed by
    other work on the machine; meaningful for single-process figures only)."""
    step()
    best = 0.0
    for _ in range(windows):
        t0, w0 = clock(), time.perf_counter()
        calls = 0
        while True:
            step()
            calls += 1
            if time.perf_counter() - w0 >= seconds / windows:
                break
        dt = clock() - t0
        if dt > 0:
            best = max(best, calls * images_per_call / dt)
    return best


def median_ms(fn, repeats: int = 200) -> float:
    fn()
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return float(np.median(times) * 1e3)


def flops_per_image(spec: list[dict], size: int = 28) -> tuple[float, float]:
    """(forward FLOPs, training FLOPs) per image: 2 per multiply-add in conv and dense layers.
    Training adds the weight gradient (same as forward) and the input gradient (same as forward)
    of every weighted layer but the first, whose input gradient is not needed."""
    h = w = size
    fwd, train, first = 0.0, 0.0, True
    for e in spec:
        t = e["type"]
        if t == "conv2d":
            k, s, p = e["kernel"], e.get("stride", 1), e.get("padding", 0)
            h, w = (h + 2 * p - k) // s + 1, (w + 2 * p - k) // s + 1
            f = 2.0 * e["out"] * e["in"] * k * k * h * w
        elif t == "dense":
            f = 2.0 * e["in"] * e["out"]
        else:
            if t in ("maxpool", "avgpool"):
                k, s = e.get("size", 2), e.get("stride") or e.get("size", 2)
                h, w = (h - k) // s + 1, (w - k) // s + 1
            continue
        fwd += f
        train += f * (2 if first else 3)
        first = False
    return fwd, train


def peak_gflops(threads: int, seconds: float) -> tuple[float, float]:
    """Measured float32 matmul rate (GFLOP/s) of 2048 x 2048 products: (machine, one thread).

    The machine figure is the larger of the ``threads``-thread rate and ``threads`` times the
    one-thread rate, so that other work on a shared machine does not make the peak look small.
    """
    a = np.random.default_rng(0).random((2048, 2048), dtype=np.float32)
    out = np.empty_like(a)
    rates = {}
    for t in sorted({1, threads}):
        with threadpool_limits(t):
            rates[t] = best_rate(lambda: np.matmul(a, a, out=out), 1, seconds, windows=5)
    flop = 2 * 2048 ** 3 / 1e9
    return max(rates[threads], threads * rates[1]) * flop, rates[1] * flop


def interleaved_best(entries: dict, seconds: float, windows: int = 5) -> dict:
    """Best images/s of each entry name -> (step, images per call, prepare or None), measured in
    turns: window 1 of every entry, then window 2 of every entry, ... so that changing load from
    other work on the machine falls on all of them alike."""
    best = dict.fromkeys(entries, 0.0)
    for _name, (step, _, prepare) in entries.items():  # warm-up
        if prepare:
            prepare()
        step()
    for _ in range(windows):
        for name, (step, images, prepare) in entries.items():
            if prepare:
                prepare()
            t0 = time.perf_counter()
            calls = 0
            while True:
                step()
                calls += 1
                dt = time.perf_counter() - t0
                if dt >= seconds / windows:
                    break
            best[name] = max(best[name], calls * images / dt)
    return best


def numpy_entries(threads: int, stack: contextlib.ExitStack) -> tuple[dict, dict]:
    """Timed steps for numpy, and the extra figures measured on their own."""
    rng = np.random.default_rng(0)
    model = build_model(ARCH, rng)
    opt = SGD(model.parameters(), lr=0.01, momentum=0.9)
    entries, extra = {}, {}
    for b in TRAIN_BATCHES:
        x = rng.random((b, 1, 28, 28), dtype=np.float32)
        y = rng.integers(0, 10, b)

        def step(x=x, y=y):
            model.grad_step(x, y)
            opt.step()
        entries[f"train_1core_b{b}"] = (step, b, None)
        with threadpool_limits(1):
            extra[f"train_1core_b{b}_per_cpu_second"] = best_rate(step, b, 1.0, clock=time.process_time)
        if threads >= 2:
            dp = stack.enter_context(DataParallel(model))

            def pstep(x=x, y=y, dp=dp):
                dp.grad_step(x, y)
                opt.step()
            entries[f"train_2proc_b{b}"] = (pstep, b, None)
    x = rng.random((INFER_BATCH, 1, 28, 28), dtype=np.float32)
    x1 = x[:1].copy()

    # one process (the model pins BLAS to one thread): one core
    def infer():
        model.predict_proba(x, batch_size=INFER_BATCH)
    entries[f"infer_1core_b{INFER_BATCH}"] = (infer, INFER_BATCH, None)
    if threads >= 2:
        dpi = stack.enter_context(DataParallel(model))
        entries[f"infer_2proc_b{INFER_BATCH}"] = (
            lambda: dpi.predict_proba(x, batch_size=INFER_BATCH), INFER_BATCH, None)
    extra[f"infer_b{INFER_BATCH}_per_cpu_second"] = best_rate(infer, INFER_BATCH, 1.0,
                                                               clock=time.process_time)
    extra["latency_ms"] = median_ms(lambda: model.predict_proba(x1))
    return entries, extra


def torch_entries(threads: int) -> tuple[dict, dict] | None:
    """Timed steps for the same network in PyTorch (None when PyTorch is not importable)."""
    try:
        import torch
    except ImportError:
        return None
    torch.manual_seed(0)
    nn = torch.nn
    model = nn.Sequential(
        nn.Conv2d(1, 6, 5, padding=2), nn.ReLU(), nn.MaxPool2d(2),
        nn.Conv2d(6, 16, 5), nn.ReLU(), nn.MaxPool2d(2), nn.Flatten(),
        nn.Linear(400, 120), nn.ReLU(), nn.Linear(120, 84), nn.ReLU(), nn.Linear(84, 10))
    opt = torch.optim.SGD(model.parameters(), lr=0.01, momentum=0.9)

    def use(n):
        return lambda: torch.set_num_threads(n)
    entries = {}
    x = torch.rand(INFER_BATCH, 1, 28, 28)

    def infer():
        with torch.inference_mode():
            torch.softmax(model(x), 1)
    for t in sorted({threads, 1}, reverse=True):
        suffix = "" if t == threads else "_1thread"
        for b in TRAIN_BATCHES if t == threads else (64, 128):
            xb = torch.rand(b, 1, 28, 28)
            yb = torch.randint(0, 10, (b,))

            def step(xb=xb, yb=yb):
                opt.zero_grad()
                torch.nn.functional.cross_entropy(model(xb), yb).backward()
                opt.step()
            entries[f"train_b{b}{suffix}"] = (step, b, use(t))
        entries[f"infer_b{INFER_BATCH}{suffix}"] = (infer, INFER_BATCH, use(t))
    torch.set_num_threads(threads)
    x1 = x[:1].clone()
    with torch.inference_mode():
        extra = {"version": torch.__version__, "threads": threads,
                 "latency_ms": median_ms(lambda: torch.softmax(model(x1), 1))}
    return entries, extra


def bench(threads: int, seconds: float) -> tuple[dict, dict | None]:
    """(numpy figures, PyTorch figures or None), the timed steps measured in turns."""
    with contextlib.ExitStack() as stack:
        np_entries, np_extra = numpy_entries(threads, stack)
        t = torch_entries(threads)
        entries = {("numpy", k): v for k, v in np_entries.items()}
        if t is not None:
            entries.update({("pytorch", k): v for k, v in t[0].items()})
        best = interleaved_best(entries, seconds)
        if t is not None:
            import torch
            torch.set_num_threads(threads)
    res_np = {k: v for (side, k), v in best.items() if side == "numpy"}
    res_np.update(np_extra)
    for b in TRAIN_BATCHES:
        res_np[f"train_b{b}"] = max(res_np[f"train_1core_b{b}"], res_np.get(f"train_2proc_b{b}", 0.0))
    res_np[f"infer_b{INFER_BATCH}"] = max(res_np[f"infer_1core_b{INFER_BATCH}"],
                                          res_np.get(f"infer_2proc_b{INFER_BATCH}", 0.0))
    res_t = None
    if t is not None:
        res_t = {k: v for (side, k), v in best.items() if side == "pytorch"}
        res_t.update(t[1])
    return res_np, res_t


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--json", action="store_true", help="print one JSON object")
    ap.add_argument("--seconds", type=float, default=2.0, help="timing time per figure")
    ap.add_argument("--threads", type=int, default=min(os.cpu_count() or 1, 2),
                    help="cores to use (numpy: processes/BLAS threads; PyTorch: set_num_threads)")
    ap.add_argument("--settings", choices=("as-is", "unset", "both"), default="as-is",
                    help="the OpenBLAS settings to run with (unset/both: in child processes)")
    args = ap.parse_args(argv)
    if args.settings != "as-is":
        child = ["--seconds", str(args.seconds), "--threads", str(args.threads)]
        runs = run_settings(child, ["as-is", "unset"] if args.settings == "both" else ["unset"])
        if args.json:
            print(json.dumps({"runs": runs}))
            return 0
        for r in runs:
            print_report(r, f"OpenBLAS settings {r['setting']}")
            print()
        return 0
    peak, peak1 = peak_gflops(args.threads, args.seconds)
    res_np, res_t = bench(args.threads, args.seconds)
    fwd, train = flops_per_image(ARCHITECTURES[ARCH])
    res_np["flops_per_image_forward"] = fwd
    res_np["flops_per_image_train"] = train
    res_np["peak_fraction_train_b128"] = res_np["train_b128"] * train / (peak * 1e9)
    res_np["peak_fraction_infer_b256"] = res_np["infer_b256"] * fwd / (peak * 1e9)
    keys = ("train_b64", "train_b128", f"infer_b{INFER_BATCH}")
    ratio = {k: (res_np[k] / res_t[k] if res_t else None) for k in keys}
    res_np.update(architecture=ARCH, threads=args.threads, peak_gflops_1thread=peak1)
    out = {"numpy": res_np, "pytorch": res_t, "ratio": ratio, "peak_gflops": peak,
           "environment": environment()}
    if args.json:
        print(json.dumps(out))
        return 0
    print_report(out, "OpenBLAS settings as-is")
    return 0


def print_report(out: dict, title: str) -> None:
    """The human-readable table of one run (``out`` as printed by --json)."""
    res_np, res_t, peak, env = out["numpy"], out["pytorch"], out["peak_gflops"], out["environment"]
    peak1, threads = res_np["peak_gflops_1thread"], res_np["threads"]
    fwd, train = res_np["flops_per_image_forward"], res_np["flops_per_image_train"]
    kernels = ", ".join(f"{b['internal_api']} {b['version']} kernel {b['architecture']}" for b in env["blas"])
    print(f"{title}: {env['cpu_model']}, {env['cores']} cores; {kernels or 'BLAS unknown'}; "
          + ", ".join(f"{k}={v if v is not None else '(unset)'}" for k, v in env["settings"].items()))
    print(f"architecture {ARCH}, 28x28 inputs, {threads} core(s); "
          "best of 5 timing windows, numpy and PyTorch in turns")
    print(f"matmul peak (float32, 2048^3): {peak:.1f} GFLOP/s on {threads} core(s), "
          f"{peak1:.1f} on one")
    print(f"FLOPs per image: forward {fwd / 1e6:.3f} M, training {train / 1e6:.3f} M")
    print(f"{'':24}{'numpy':>12}{'pytorch':>12}{'ratio':>8}")
    for k in [f"train_b{b}" for b in TRAIN_BATCHES] + [f"infer_b{INFER_BATCH}", "latency_ms"]:
        t = res_t[k] if res_t else None
        r = "" if not t else f"{res_np[k] / t:8.2f}" if k != "latency_ms" else f"{t / res_np[k]:8.2f}"
        unit = "ms" if k == "latency_ms" else "img/s"
        print(f"{k + ' (' + unit + ')':24}{res_np[k]:12.1f}{(t if t else float('nan')):12.1f}{r}")
    for k in [f"train_b{b}" for b in TRAIN_BATCHES] + [f"infer_b{INFER_BATCH}"]:
        one, two = k.replace("_b", "_1core_b"), k.replace("_b", "_2proc_b")
        if two in res_np:
            print(f"  numpy {k}: 1 process on 1 core {res_np[one]:.0f}, "
                  f"2 processes {res_np[two]:.0f} img/s")
    if res_t and "train_b64_1thread" in res_t:
        pairs = [(f"train_b{b}", res_np[f"train_1core_b{b}"], res_t[f"train_b{b}_1thread"])
                 for b in (64, 128)]
        pairs.append((f"infer_b{INFER_BATCH}", res_np[f"infer_1core_b{INFER_BATCH}"],
                      res_t[f"infer_b{INFER_BATCH}_1thread"]))
        print("one core each (numpy 1 process, PyTorch 1 thread): "
              + ", ".join(f"{k} {a:.0f} vs {b:.0f}" for k, a, b in pairs))
    print("numpy images per CPU second (one process; little disturbed by other load): training "
          + ", ".join(f"b{b} {res_np[f'train_1core_b{b}_per_cpu_second']:.0f}" for b in TRAIN_BATCHES)
          + f"; inference b{INFER_BATCH} {res_np[f'infer_b{INFER_BATCH}_per_cpu_second']:.0f}")
    print(f"numpy share of matmul peak: training b128 {res_np['peak_fraction_train_b128']:.2f}, "
          f"inference b256 {res_np['peak_fraction_infer_b256']:.2f}")
    if res_t is None:
        print("PyTorch not importable: no comparison")


if __name__ == "__main__":
    sys.exit(main())
