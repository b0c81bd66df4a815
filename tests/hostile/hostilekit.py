"""The hostile-case kit: a case table, bad inputs made in a case's own folder, one runner, one set of checks.

A case is ``Case(id, build, code, words)``: ``build(world)`` makes the bad input inside the case's
folder and returns the command line; the command runs (in this process through typer's CliRunner,
or with ``proc=True`` as the real entry point in a fresh interpreter); then :func:`check` asserts the
exit code, that nothing printed a traceback, that an error is ONE line on stderr holding ``words``
(the file's name and the problem), that the existing output folder's ledger is unchanged (``ledger=
"same"``) or keeps every row it had (``"kept"``), and that nothing was written outside the case's
folder.  The id's prefix before the first ``-`` is the command the case belongs to (the summary in
conftest.py counts by it).
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import shutil
import sqlite3
import struct
import subprocess
import sys
import traceback
import zlib
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

REPO = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(REPO / "tests" / "read"))
from readkit import demo_layout, tiny_model, write_copies  # noqa: E402

TIMEOUT = 90  # seconds for one subprocess case


@dataclass(frozen=True)
class Case:
    """One hostile case (see the module docstring)."""

    id: str
    build: Callable
    code: int | tuple
    words: tuple = ()
    ledger: str | None = None          # "same" | "kept" | None (the case does not target w.out)
    proc: bool = False                 # run the real entry point in a fresh interpreter
    after: Callable | None = None      # extra checks: after(world, result)
    where: str = "out"                 # the output folder ``ledger`` is about: "out" or "reviewed"

    @property
    def command(self) -> str:
        return self.id.split("-", 1)[0]


def params(cases: list[Case]) -> list:
    """``pytest.param`` for each case, with its id (ids must be unique)."""
    ids = [c.id for c in cases]
    dup = {i for i in ids if ids.count(i) > 1}
    assert not dup, f"duplicate case ids: {dup}"
    return [pytest.param(c, id=c.id) for c in cases]


@dataclass
class World:
    """The folder of one case and the good things a bad input is made beside."""

    root: Path                 # the case's own folder: everything a case may write is under it
    model: Path                # a tiny model file (readkit.tiny_model)
    layout: Path               # a copy of the demo layout
    page: Path                 # one good demo page (PNG)
    out: Path                  # an existing output folder (two pages read)
    reviewed: Path             # an existing output folder with reviewed fields (tests/review fixture)
    reviewed_layout: Path      # its layout (the run names it)
    samples: Path              # a small good samples folder (two digits, a few images each)
    home: Path                 # FORMREAD_HOME of the case
    outside: Path              # a folder beside the case folder that no case may write into
    frozen: list = field(default_factory=list)

    def path(self, name: str) -> Path:
        return self.root / name

    def freeze(self, path: Path) -> Path:
        """Make ``path`` immutable (``chattr +i``: read-only even for root); undone at the end of the case."""
        try:
            done = subprocess.run(["chattr", "+i", str(path)], capture_output=True).returncode == 0
        except OSError:         # no chattr on this machine
            done = False
        if done:
            self.frozen.append((path, None))
            return path
        if os.geteuid() == 0:   # root ignores permission bits: only the immutable flag makes it read-only
            pytest.skip("read-only cases need chattr +i on this filesystem (running as root)")
        mode = path.stat().st_mode
        path.chmod(0o555 if path.is_dir() else 0o444)       # not root: permission bits are enough
        self.frozen.append((path, mode))
        return path

    def thaw(self) -> None:
        for p, mode in reversed(self.frozen):
            if mode is None:
                subprocess.run(["chattr", "-i", str(p)], check=False)
            else:
                p.chmod(mode)
        self.frozen.clear()


# ------------------------------------------------------------------------------------------ bad inputs


def steps(*fns):
    """A build made of steps run in order; the last one's result (the command line) is returned."""
    def build(w):
        result = None
        for fn in fns:
            result = fn(w)
        return result
    return build


def write(path: Path, data: bytes | str) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(data.encode("utf-8") if isinstance(data, str) else data)
    return path


def truncated(src: Path, dst: Path, keep: float = 0.5) -> Path:
    data = src.read_bytes()
    return write(dst, data[: max(1, int(len(data) * keep))])


def page_as(w: World, name: str, *, mode: str | None = None, fmt: str | None = None, **save) -> Path:
    """The good page saved as ``name`` (converted to ``mode``, in format ``fmt``)."""
    with Image.open(w.page) as src:
        im = src.copy()
    if mode == "I;16":
        im = Image.fromarray(np.asarray(im.convert("L"), np.uint16) * 257)
    elif mode is not None:
        im = im.convert(mode)
    dst = w.path(name)
    im.save(dst, format=fmt, dpi=(200, 200), **save)
    return dst


def png_bomb(path: Path, side: int = 60_000) -> Path:
    """A valid little PNG header announcing ``side`` x ``side`` grey pixels (a few KB on disk)."""
    def chunk(kind: bytes, body: bytes) -> bytes:
        return struct.pack(">I", len(body)) + kind + body + struct.pack(">I", zlib.crc32(kind + body) & 0xFFFFFFFF)

    row = b"\0" + b"\xff" * (side // 8)
    raw = zlib.compress(row * 64, 9)
    ihdr = struct.pack(">IIBBBBB", side, side, 1, 0, 0, 0, 0)
    return write(path, b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", ihdr) + chunk(b"IDAT", raw) + chunk(b"IEND", b""))


def pdf_text(pages: list[str] | None = None, *, media=(0, 0, 595, 842), extra_trailer: str = "",
             extra_objects: tuple = ()) -> bytes:
    """A small hand-written PDF (no pages when ``pages`` is empty)."""
    objs = ["<< /Type /Catalog /Pages 2 0 R >>"]
    kids = " ".join(f"{3 + i} 0 R" for i in range(len(pages or [])))
    objs.append(f"<< /Type /Pages /Kids [{kids}] /Count {len(pages or [])} >>")
    for _ in pages or []:
        objs.append(f"<< /Type /Page /Parent 2 0 R /MediaBox [{' '.join(map(str, media))}] >>")
    objs += list(extra_objects)
    out = b"%PDF-1.4\n"
    offsets = []
    for i, o in enumerate(objs):
        offsets.append(len(out))
        out += f"{i + 1} 0 obj\n{o}\nendobj\n".encode()
    xref = len(out)
    out += f"xref\n0 {len(objs) + 1}\n0000000000 65535 f \n".encode()
    out += "".join(f"{o:010d} 00000 n \n" for o in offsets).encode()
    out += f"trailer\n<< /Size {len(objs) + 1} /Root 1 0 R {extra_trailer}>>\nstartxref\n{xref}\n%%EOF\n".encode()
    return out


def mkfifo(path: Path) -> Path:
    os.mkfifo(path)
    return path


def layout_text(w: World) -> str:
    return w.layout.read_text(encoding="utf-8")


def bad_layout(w: World, name: str, text: str | bytes) -> Path:
    return write(w.path(name), text)


def edited_layout(w: World, name: str, old: str, new: str, count: int = 1) -> Path:
    text = layout_text(w)
    assert old in text, old
    return write(w.path(name), text.replace(old, new, count))


def npz_with(path: Path, **arrays) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    with open(path, "wb") as f:
        np.savez(f, **arrays)
    return path


def model_with_header(w: World, name: str, edit: Callable[[dict], None], *, reseal: bool) -> Path:
    """A copy of the tiny model whose header.json ``edit`` changed; ``reseal`` recomputes its checksum
    (so the value itself is judged, not only the checksum)."""
    from formread.nn.modelfile import header_sha256

    with np.load(w.model, allow_pickle=False) as z:
        arrays = {k: z[k] for k in z.files}
    header = json.loads(arrays["header.json"].tobytes().decode("utf-8"))
    edit(header)
    if reseal:
        header["sha256"] = header_sha256(header)
    arrays["header.json"] = np.frombuffer(json.dumps(header).encode("utf-8"), np.uint8)
    return npz_with(w.path(name), **arrays)


def make_model(w: World, name: str, spec: list, header: dict) -> Path:
    from formread.nn.model import build_model
    from formread.nn.modelfile import save_networks

    save_networks(w.path(name), [build_model(spec, np.random.default_rng(1))], header)
    return w.path(name)


def sqlite_file(path: Path, *statements: str) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    conn = sqlite3.connect(path)
    for s in statements:
        conn.execute(s)
    conn.commit()
    conn.close()
    return path


def samples_folder(root: Path, counts: dict, *, size=(20, 16)) -> Path:
    """A samples folder DIR/<digit>/*.png with ``counts[digit]`` simple images each."""
    for d, n in counts.items():
        (root / str(d)).mkdir(parents=True, exist_ok=True)
        for i in range(n):
            a = np.zeros(size, np.uint8)
            a[3:17, 4 + d % 8:7 + d % 8] = 255
            a[2 + i % 5, 2] = 255
            Image.fromarray(a).save(root / str(d) / f"s{i}.png")
    return root


# ------------------------------------------------------------------------------------------ snapshots


def ledger_snapshot(outdir: Path):
    """Every table's rows (a readable ledger) or the file's bytes' hash (an unreadable one)."""
    db = Path(outdir) / "ledger.sqlite"
    if not db.exists():
        return None
    try:
        conn = sqlite3.connect(f"file:{db}?mode=ro", uri=True)
        try:
            tables = [r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type='table' ORDER BY name")]
            snap = {t: sorted(map(repr, conn.execute(f'SELECT * FROM "{t}"'))) for t in tables}
            snap["pragma user_version"] = conn.execute("PRAGMA user_version").fetchone()
            return snap
        finally:
            conn.close()
    except sqlite3.DatabaseError:
        return ("bytes", hashlib.sha256(db.read_bytes()).hexdigest())


def listing(folder: Path) -> dict:
    """{relative path: (size, mtime_ns)} of every file under ``folder`` (links not followed)."""
    out = {}
    if not folder.exists():
        return out
    for dirpath, dirnames, filenames in os.walk(folder):
        for n in filenames + [d for d in dirnames if os.path.islink(os.path.join(dirpath, d))]:
            p = os.path.join(dirpath, n)
            try:
                st = os.lstat(p)
            except OSError:
                continue
            out[os.path.relpath(p, folder)] = (st.st_size, st.st_mtime_ns)
    return out


def guarded(w: World) -> dict:
    """What no case may change: the folder beside the case, the shipped files, the repository's top."""
    from formread.store import demo_forms, shipped_model

    top = {n: os.lstat(REPO / n).st_mtime_ns for n in os.listdir(REPO) if n != ".venv"}
    return {"outside": listing(w.outside), "demo": listing(demo_forms()), "models": listing(shipped_model().parent),
            "repo": top}


# ------------------------------------------------------------------------------------------ running


@dataclass
class Result:
    code: int
    out: str
    err: str


def run(case: Case, w: World, argv: list) -> Result:
    """Run the command line ``argv`` (str or bytes items) as the case says, in the case's folder."""
    env = dict(os.environ, FORMREAD_HOME=str(w.home), COLUMNS="200", TERM="dumb", NO_COLOR="1")
    if case.proc or any(isinstance(a, bytes) for a in argv):
        cmd = [sys.executable, "-c", "from formread.cli.main import main; main()", *argv]
        p = subprocess.run(cmd, cwd=w.root, env=env, capture_output=True, timeout=TIMEOUT)
        return Result(p.returncode, p.stdout.decode("utf-8", "replace"), p.stderr.decode("utf-8", "replace"))
    from typer.testing import CliRunner

    from formread.cli.main import app

    old = os.getcwd()
    os.chdir(w.root)
    try:
        res = CliRunner(env={"COLUMNS": "200", "TERM": "dumb", "NO_COLOR": "1"}).invoke(
            app, [str(a) for a in argv], catch_exceptions=True)
    finally:
        os.chdir(old)
    err = res.stderr
    if res.exception is not None and not isinstance(res.exception, SystemExit):
        err += "".join(traceback.format_exception(res.exception))
    return Result(res.exit_code, res.stdout, err)


_BOX = re.compile(r"[│╭╮╰╯─]+")


def plain(text: str) -> str:
    """Text with rich's box drawing removed and whitespace collapsed (usage errors come in a box)."""
    return " ".join(_BOX.sub(" ", text).split())


def check(case: Case, w: World, res: Result) -> None:
    """The checks every case gets (see the module docstring)."""
    both = res.out + res.err
    assert "Traceback" not in both, f"{case.id}: a traceback\n{both[-4000:]}"
    codes = case.code if isinstance(case.code, tuple) else (case.code,)
    assert res.code in codes, f"{case.id}: exit code {res.code}, expected {codes}\n{both[-3000:]}"
    if res.code == 1:
        lines = [ln for ln in res.err.splitlines() if ln.strip()]
        assert len(lines) == 1 and lines[0].startswith("formread: error: "), f"{case.id}: not one line\n{res.err}"
        where = lines[0]
    else:
        where = plain(both)
    for word in case.words:
        assert word in where, f"{case.id}: {word!r} not in the message\n{where[:3000]}"


def snapshot_before(case: Case, w: World):
    return ledger_snapshot(getattr(w, case.where)) if case.ledger else None


def check_after(case: Case, w: World, before, guard_before: dict) -> None:
    outdir = getattr(w, case.where)
    if case.ledger == "same":
        assert ledger_snapshot(outdir) == before, f"{case.id}: the existing ledger changed"
    elif case.ledger == "kept":
        after = ledger_snapshot(outdir)
        assert isinstance(after, dict) and isinstance(before, dict), f"{case.id}: the ledger became unreadable"
        for table, rows in before.items():
            if table in ("pragma user_version",):
                assert after[table] == rows
                continue
            if table == "runs":          # a new run row is added; the earlier runs keep their rows
                continue
            missing = set(rows) - set(after.get(table, []))
            assert not missing, f"{case.id}: rows of {table} lost or changed: {sorted(missing)[:2]}"
    assert guarded(w) == guard_before, f"{case.id}: a file outside the case's folder changed"


def execute(case: Case, w: World) -> Result:
    """Build, snapshot, run, check: the body of every table-driven test."""
    try:
        argv = case.build(w)
        before = snapshot_before(case, w)
        guard = guarded(w)
        res = run(case, w, argv)
        if os.environ.get("HOSTILE_SHOW"):     # a developer's look at every message: HOSTILE_SHOW=FILE
            with open(os.environ["HOSTILE_SHOW"], "a", encoding="utf-8") as f:
                f.write(f"{case.id}\t{res.code}\t{plain(res.err)[:300]}\t{plain(res.out)[-300:]}\n")
        check(case, w, res)
        check_after(case, w, before, guard)
        if case.after is not None:
            case.after(w, res)
        return res
    finally:
        w.thaw()


def copy_out(src: Path, dst: Path) -> Path:
    shutil.copytree(src, dst, symlinks=True)
    return dst


__all__ = ["Case", "World", "params", "execute", "steps", "write", "truncated", "page_as", "png_bomb", "pdf_text",
           "mkfifo", "layout_text", "bad_layout", "edited_layout", "npz_with", "model_with_header", "make_model",
           "sqlite_file", "samples_folder", "ledger_snapshot", "demo_layout", "tiny_model", "write_copies",
           "copy_out", "run", "check", "plain", "REPO"]
