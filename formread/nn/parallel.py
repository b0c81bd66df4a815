"""Two-process data parallelism: both CPU cores on one training (or inference) batch.

Small convolutions keep a single BLAS thread busy but scale poorly across threads, so instead the
batch is split in two: this process computes the gradient of its half while one worker process
computes the other half on a replica whose weights live in shared memory. The worker is a fresh
``python -m formread.nn.parallel`` (no fork, and no ``if __name__ == "__main__"`` guard needed in
the caller); weights, inputs and gradients pass through a memory-mapped file that is unlinked as
soon as both processes have mapped it; commands and answers are text lines on its stdin/stdout,
which the waiting side polls for a moment before it sleeps (see ``_SPIN_SECONDS``).
The two mean gradients are combined weighted by the half sizes, so the result is the gradient of
the mean loss over the whole batch, as ``Sequential.grad_step`` gives it. BLAS is pinned to one
thread in both processes while the context is open. The gain needs a second idle core: measured
in CPU time, a batch of 128 costs each process about half of what one process needs alone.

Usage::

    with DataParallel(model) as dp:
        for xb, yb in batches:
            loss, correct = dp.grad_step(xb, yb)
            optimizer.step()

``predict_proba`` splits inference batches the same way (logits come back through shared memory).

Dropout masks of the worker's half come from the worker's own generator (seeded by ``seed``),
so a run is reproducible for a given seed but differs from a single-process run.
"""

from __future__ import annotations

import json
import os
import select
import signal
import subprocess
import sys
import tempfile
import time
import weakref

import numpy as np
from threadpoolctl import threadpool_limits

from formread.errors import check_param
from formread.nn.losses import softmax
from formread.nn.model import Sequential, build_model

__all__ = ["DataParallel"]


def _layout(dtype, shapes, capacity, in_shape, classes):
    """Byte offsets of (params, grads, x, y, logits) in the shared file, and its size."""
    item = np.dtype(dtype).itemsize
    total = sum(int(np.prod(s)) for s in shapes)
    img = int(np.prod(in_shape))
    offs = [0, total * item, 2 * total * item, (2 * total + capacity * img) * item]
    offs.append(offs[3] + capacity * 8)
    size = offs[4] + capacity * classes * item
    return offs, size


def _map(path, dtype, shapes, capacity, in_shape, classes):
    """Map the shared file: (param views, grad views, x buffer (capacity, *in_shape),
    y (capacity,) int64, logits (capacity, classes))."""
    offs, size = _layout(dtype, shapes, capacity, in_shape, classes)
    # plain ndarray views (not the np.memmap subclass, whose wrapping would slow every operation)
    mm = np.memmap(path, dtype=np.uint8, mode="r+", shape=(size,)).view(np.ndarray)
    total = sum(int(np.prod(s)) for s in shapes)

    def split(off):
        flat = mm[off:off + total * np.dtype(dtype).itemsize].view(dtype)
        out, at = [], 0
        for shape in shapes:
            k = int(np.prod(shape))
            out.append(flat[at:at + k].reshape(shape))
            at += k
        return out
    x = mm[offs[2]:offs[3]].view(dtype).reshape((capacity,) + tuple(in_shape))
    y = mm[offs[3]:offs[4]].view(np.int64)
    z = mm[offs[4]:size].view(dtype).reshape(capacity, classes)
    return split(offs[0]), split(offs[1]), x, y, z


# How long a process waiting for the other polls the pipe before it sleeps in select(): waking a
# sleeping process (on a virtual CPU) took 100-500 microseconds here (measured), a large share of a
# 1-2 ms training step. Short, so that idle workers give their core back soon (20 ms was measured
# slower in benchmarks that keep several workers).
_SPIN_SECONDS = 0.002


class _LineReader:
    """Lines (str, with the newline) from a pipe's file descriptor, polled without blocking for up
    to ``spin`` seconds before waiting in select(); '' at end of input."""

    def __init__(self, fd: int, spin: float = _SPIN_SECONDS):
        self.fd, self.spin, self.buf = fd, spin, b""
        os.set_blocking(fd, False)

    def readline(self) -> str:
        while True:
            end = self.buf.find(b"\n")
            if end >= 0:
                line, self.buf = self.buf[:end + 1], self.buf[end + 1:]
                return line.decode()
            chunk = self._read()
            if not chunk:  # end of input
                line, self.buf = self.buf, b""
                return line.decode()
            self.buf += chunk

    def _read(self) -> bytes:
        t0 = time.perf_counter()
        while True:
            try:
                return os.read(self.fd, 65536)
            except BlockingIOError:
                if time.perf_counter() - t0 > self.spin:
                    select.select([self.fd], [], [])


def _worker_main() -> None:
    """Worker process: one JSON set-up line on stdin, then command lines ("g n smoothing": gradient
    of x[:n], y[:n]; "p n": logits of x[:n]); one answer line each on stdout."""
    # Ctrl-C is for the parent: it stops training and then closes our input, which ends this loop.
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    inp, out = sys.stdin, sys.stdout
    cfg = json.loads(inp.readline())
    dtype = np.dtype(cfg["dtype"])
    shapes = [tuple(s) for s in cfg["shapes"]]
    with threadpool_limits(1):
        model = build_model(cfg["spec"], np.random.default_rng(cfg["seed"]), dtype=dtype)
        params = model.parameters()
        pviews, gviews, xbuf, ybuf, zbuf = _map(cfg["path"], dtype, shapes, cfg["capacity"],
                                                cfg["in_shape"], cfg["classes"])
        for p, v in zip(params, pviews):
            p.value = v  # weights are read from the shared file on every pass
        out.write("ready\n")
        out.flush()
        # nothing else was sent before "ready": the text wrapper holds no buffered commands
        reader = _LineReader(inp.fileno())
        for line in iter(reader.readline, ""):
            words = line.split()
            if not words:
                break
            try:
                n = int(words[1])
                if words[0] == "p":
                    model._logits(xbuf[:n], out=zbuf[:n])
                    out.write("ok 0 0\n")
                else:
                    loss, correct = model.grad_step(xbuf[:n], ybuf[:n], float(words[2]))
                    for g, p in zip(gviews, params):
                        np.copyto(g, p.grad)
                    out.write(f"ok {loss!r} {correct}\n")
            except Exception as e:  # reported to the parent, which raises it
                out.write("error " + f"{type(e).__name__}: {e}".replace("\n", " ") + "\n")
            out.flush()


def _shutdown(proc, path):
    try:
        proc.stdin.close()  # end of input: the worker leaves its loop
    except OSError:
        pass
    try:
        proc.wait(timeout=10)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait()
    proc.stdout.close()
    if os.path.exists(path):
        os.unlink(path)


class DataParallel:
    """Gradient steps on a batch split over this process and one worker process.

    model : the Sequential whose ``.grad`` fields each ``grad_step`` fills (its weights are sent to
    the worker at every step, so optimizers update ``model`` as usual). seed : seeds the worker's
    dropout generator. The worker starts at the first ``grad_step`` and stops on ``close()`` or when
    the ``with`` block ends; it also stops by itself when this process ends (its input closes).
    """

    def __init__(self, model: Sequential, seed: int = 0):
        check_param(isinstance(model, Sequential), "model", "a Sequential", type(model))
        self.model = model
        self.seed = int(seed)
        self._proc: subprocess.Popen[str] | None = None
        self._capacity = 0
        self._in_shape: tuple | None = None
        self._limits = None
        self._finalizer: weakref.finalize | None = None

    def __enter__(self) -> DataParallel:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def close(self) -> None:
        """Stop the worker process (waits for it) and restore the BLAS thread count."""
        self.close_worker()
        if self._limits is not None:
            self._limits.restore_original_limits()
            self._limits = None

    def close_worker(self) -> None:
        """Stop the worker process only (it restarts at the next ``grad_step``)."""
        if self._finalizer is not None:
            self._finalizer()
            self._finalizer = None
        self._proc = None

    def _start(self, capacity: int, in_shape: tuple) -> None:
        self.close_worker()
        if self._limits is None:
            self._limits = threadpool_limits(1)
        dtype = np.dtype(self.model.dtype)
        shapes = [p.value.shape for p in self.model.parameters()]
        classes = self.model.spec_classes()
        _, size = _layout(dtype, shapes, capacity, in_shape, classes)
        folder = "/dev/shm" if os.path.isdir("/dev/shm") and os.access("/dev/shm", os.W_OK) else None
        fd, path = tempfile.mkstemp(prefix="formread-dp-", suffix=".bin", dir=folder)
        with os.fdopen(fd, "wb") as f:
            f.truncate(size)
        self._pviews, self._gviews, self._xbuf, self._ybuf, self._zbuf = _map(
            path, dtype, shapes, capacity, in_shape, classes)
        env = dict(os.environ, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1", MKL_NUM_THREADS="1")
        # the worker imports this same formread, installed or not
        root = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
        env["PYTHONPATH"] = os.pathsep.join(filter(None, [root, os.environ.get("PYTHONPATH")]))
        proc = subprocess.Popen([sys.executable, "-m", "formread.nn.parallel"], stdin=subprocess.PIPE,
                                stdout=subprocess.PIPE, text=True, bufsize=1, env=env)
        assert proc.stdin is not None and proc.stdout is not None  # both are pipes
        self._finalizer = weakref.finalize(self, _shutdown, proc, path)
        cfg = {"path": path, "dtype": dtype.str, "shapes": [list(s) for s in shapes],
               "spec": self.model.spec, "seed": self.seed, "capacity": capacity,
               "in_shape": list(in_shape), "classes": classes}
        proc.stdin.write(json.dumps(cfg) + "\n")
        proc.stdin.flush()
        ready = proc.stdout.readline().strip() == "ready"
        os.unlink(path)  # both processes have it mapped: nothing is left behind, even after a kill
        if not ready:
            self.close_worker()
            raise RuntimeError("data-parallel worker process failed to start")
        self._proc, self._capacity, self._in_shape = proc, capacity, tuple(in_shape)
        self._reader = _LineReader(proc.stdout.fileno())  # the worker wrote nothing after "ready"
        self._path = path

    def grad_step(self, x: np.ndarray, y: np.ndarray, smoothing: float = 0.0) -> tuple[float, int]:
        """Like ``Sequential.grad_step`` on the whole batch, computed on two cores.

        x : (N, C, H, W) float; y : (N,) int. Fills ``model``'s gradients (of the mean loss over
        all N) and returns (mean loss, number of correct predictions).
        """
        x = np.asarray(x)
        y = np.asarray(y)
        n = len(x)
        check_param(len(y) == n, "y", f"{n} labels", len(y))
        classes = self.model.spec_classes()
        check_param(np.issubdtype(y.dtype, np.integer) and (n == 0 or (y.min() >= 0 and y.max() < classes)),
                    "y", f"integer labels in [0, {classes})", (str(y.dtype), y.min() if n else None,
                                                                y.max() if n else None))
        if n < 2:
            return self.model.grad_step(x, y, smoothing)
        n1 = n // 2
        n2 = n - n1
        self._send(x[n1:], f"g {n2} {float(smoothing)!r}", y[n1:])
        try:
            loss1, c1 = self.model.grad_step(x[:n1], y[:n1], smoothing)
        finally:  # always collect the worker's answer so the next step stays in step
            loss2, c2 = self._receive()
        w1, w2 = n1 / n, n2 / n
        for p, g in zip(self.model.parameters(), self._gviews):
            if n1 == n2:  # (a + b) / 2: two passes, no temporary
                p.grad += g
                p.grad *= p.grad.dtype.type(0.5)
            else:
                p.grad *= p.grad.dtype.type(w1)
                p.grad += p.grad.dtype.type(w2) * g
        return w1 * loss1 + w2 * loss2, c2 + c1

    def predict_proba(self, x: np.ndarray, batch_size: int = 256, temperature: float = 1.0
                      ) -> np.ndarray:
        """Like ``Sequential.predict_proba``, each batch split over the two processes.

        x : (N, C, H, W) float -> (N, classes) float32 softmax(logits / temperature).
        """
        check_param(batch_size >= 1, "batch_size", "a positive integer", batch_size)
        check_param(temperature > 0, "temperature", "a positive number", temperature)
        x = np.asarray(x)
        outs = []
        for start in range(0, len(x), batch_size):
            xb = x[start:start + batch_size]
            n = len(xb)
            if n < 2:
                z = self.model._logits(xb)
            else:
                n1 = n // 2
                n2 = n - n1
                self._send(xb[n1:], f"p {n2}")
                try:
                    z1 = self.model._logits(xb[:n1])
                finally:
                    self._receive()
                z = np.concatenate([z1, self._zbuf[:n2]], axis=0)
            outs.append(softmax(z / z.dtype.type(temperature), axis=1).astype(np.float32))
        if not outs:
            return np.zeros((0, self.model.spec_classes()), dtype=np.float32)
        return np.concatenate(outs, axis=0)

    def _send(self, xpart: np.ndarray, command: str, ypart: np.ndarray | None = None) -> None:
        """Put the worker's share of the batch (and the weights) in shared memory, then send the
        command line: the worker reads the shared arrays only after the line arrives."""
        n2 = len(xpart)
        if self._proc is None or n2 > self._capacity or tuple(xpart.shape[1:]) != self._in_shape:
            self._start(max(n2, self._capacity), xpart.shape[1:])
        for v, p in zip(self._pviews, self.model.parameters()):
            np.copyto(v, p.value)
        np.copyto(self._xbuf[:n2], xpart, casting="unsafe")
        if ypart is not None:
            self._ybuf[:n2] = ypart
        assert self._proc is not None and self._proc.stdin is not None  # _start ran and made the pipe
        try:
            self._proc.stdin.write(command + "\n")
            self._proc.stdin.flush()
        except OSError:
            self.close_worker()
            raise RuntimeError("data-parallel worker process has stopped") from None

    def _receive(self) -> tuple[float, int]:
        """The worker's answer to the last command: (loss, correct)."""
        try:
            answer = self._reader.readline().split(" ", 2)
        except BaseException:  # e.g. interrupted while waiting: the worker is out of step
            self.close_worker()
            raise
        if answer[0] != "ok":
            self.close_worker()
            raise RuntimeError("data-parallel worker failed: " + (" ".join(answer[1:]).strip() or "stopped"))
        return float(answer[1]), int(answer[2])

if __name__ == "__main__":
    _worker_main()
