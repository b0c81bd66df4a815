"""The data flows one way: import rules between subpackages (DEVELOPERS.md)."""

import ast
from pathlib import Path

PKG = Path(__file__).resolve().parents[1] / "formread"


def _imports(path: Path) -> set[str]:
    """Absolute names of the formread modules a file imports."""
    rel = path.relative_to(PKG.parent).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    pkg = parts if path.name == "__init__.py" else parts[:-1]
    out = set()
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.Import):
            out.update(a.name for a in node.names if a.name.startswith("formread"))
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = pkg[: len(pkg) - node.level + 1]
                name = ".".join(base + ([node.module] if node.module else []))
            else:
                name = node.module or ""
            if name.startswith("formread"):
                out.add(name)
                out.update(f"{name}.{a.name}" for a in node.names)
    return out


def _violations(sub: str, forbidden: tuple[str, ...]) -> list[str]:
    bad = []
    for f in (PKG / sub).rglob("*.py") if (PKG / sub).is_dir() else [PKG / sub]:
        for name in _imports(f):
            if any(name == b or name.startswith(b + ".") for b in forbidden):
                bad.append(f"{f.relative_to(PKG.parent)} imports {name}")
    return bad


GROUND = ("formread.errors", "formread.fileio", "formread.digits")
"""The ground floor: what any part may import."""


def _outside(sub: str, allowed: tuple[str, ...]) -> list[str]:
    """Imports of formread modules by ``sub`` that are neither ``sub`` itself nor ``allowed``."""
    own = "formread." + sub.removesuffix(".py").replace("/", ".")
    bad = []
    for f in (PKG / sub).rglob("*.py") if (PKG / sub).is_dir() else [PKG / sub]:
        for name in _imports(f):
            if name == "formread" or name == own or name.startswith(own + "."):
                continue
            if not any(name == a or name.startswith(a + ".") for a in allowed):
                bad.append(f"{f.relative_to(PKG.parent)} imports {name}")
    return bad


def test_nn_imports_only_the_ground_floor():
    assert _outside("nn", GROUND) == []


def test_the_ground_floor_imports_nothing_of_formread():
    for mod in ("digits.py", "errors.py", "fileio.py"):
        assert _outside(mod, ()) == []


def test_the_form_contract_imports_only_the_ground_floor():
    assert _outside("form", GROUND) == []


def test_imaging_imports_only_the_form_contract_and_the_ground_floor():
    assert _outside("imaging", GROUND + ("formread.form",)) == []


def test_the_ledger_layer_imports_only_the_ground_floor():
    assert _outside("ledger", GROUND) == []


def test_nothing_imports_cli():
    bad = []
    for f in PKG.rglob("*.py"):
        if "cli" in f.relative_to(PKG).parts:
            continue
        bad += [f"{f} imports {n}" for n in _imports(f) if n.startswith("formread.cli")]
    assert bad == []


def test_read_does_not_import_review():
    assert _violations("read", ("formread.review", "formread.cli")) == []
