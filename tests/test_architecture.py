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


def test_the_ground_floor_imports_only_the_error_types():
    assert _outside("errors.py", ()) == []
    for mod in ("digits.py", "fileio.py"):
        assert _outside(mod, ("formread.errors",)) == []


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


def _calls_and_keys(path: Path):
    """(dotted call names, string constants used as a subscript or as the first argument of .get) of a file."""
    calls, keys = set(), set()
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.Call):
            f = node.func
            if isinstance(f, ast.Attribute) and isinstance(f.value, ast.Name):
                calls.add(f"{f.value.id}.{f.attr}")
            if (isinstance(f, ast.Attribute) and f.attr == "get" and node.args
                    and isinstance(node.args[0], ast.Constant) and isinstance(node.args[0].value, str)):
                keys.add(node.args[0].value)
        elif isinstance(node, ast.Subscript) and isinstance(node.slice, ast.Constant) \
                and isinstance(node.slice.value, str):
            keys.add(node.slice.value)
    return calls, keys


def _package_files():
    return [f for f in PKG.rglob("*.py")]


def test_only_the_ledger_layer_opens_the_sqlite_file():
    bad = [str(f.relative_to(PKG.parent)) for f in _package_files()
           if "ledger" not in f.relative_to(PKG).parts and "sqlite3.connect" in _calls_and_keys(f)[0]]
    assert bad == []


def test_only_the_bundle_loader_reads_the_fitted_parts_of_a_model_header():
    # the temperature, the decoder's constants and the fitted decisions are read in one place
    allowed = {PKG / "read" / "bundle.py", PKG / "nn" / "modelfile.py"}
    bad = [f"{f.relative_to(PKG.parent)} reads {k!r}" for f in _package_files() if f not in allowed
           for k in _calls_and_keys(f)[1] & {"decoder", "decisions", "temperature"}]
    assert bad == []
