"""The layer table of DEVELOPERS.md is the package's import rule: a module
may import from its own layer and the layers below it, never from above.

The table is parsed from DEVELOPERS.md itself (so the document and the code
cannot drift apart), every module of the package must sit in exactly one
layer, and every import is checked, including imports inside functions
(those are how a lower layer would quietly reach up). Imports under
``if TYPE_CHECKING:`` are type annotations only and are not checked.
"""

from __future__ import annotations

import ast
import re
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PKG = ROOT / "clusterlab"


def _expand(pattern: str) -> list[str]:
    """``a/{b,c}.py`` -> ``["a/b.py", "a/c.py"]`` (one brace group at most)."""
    m = re.search(r"\{([^}]*)\}", pattern)
    if not m:
        return [pattern]
    return [pattern[: m.start()] + part.strip() + pattern[m.end():] for part in m.group(1).split(",")]


def layer_table() -> dict[str, int]:
    """pattern -> layer from the '## Architecture' table of DEVELOPERS.md."""
    text = (ROOT / "DEVELOPERS.md").read_text(encoding="utf-8")
    section = text.split("## Architecture", 1)[1].split("\n## ", 1)[0]
    table: dict[str, int] = {}
    for line in section.splitlines():
        m = re.match(r"\|\s*(\d+)\.", line)
        if not m:
            continue
        modules = line.split("|")[2]
        for pat in re.findall(r"`([^`]+)`", modules):
            for p in _expand(pat):
                if p in table:
                    raise AssertionError(f"{p} is listed twice in DEVELOPERS.md's layer table")
                table[p] = int(m.group(1))
    return table


def module_name(path: Path) -> str:
    rel = path.relative_to(ROOT).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(parts)


def layer_of(path: Path, table: dict[str, int]) -> int | None:
    """Layer of a module file: an exact entry (``film.py``) wins over a
    folder entry (``qm/``); the package front ``__init__.py`` is its own entry."""
    rel = path.relative_to(PKG).as_posix()
    if rel in table:
        return table[rel]
    best = None
    for pat, layer in table.items():
        if pat.endswith("/") and rel.startswith(pat):
            if best is None or len(pat) > len(best[0]):
                best = (pat, layer)
    return None if best is None else best[1]


def _type_checking_lines(tree: ast.AST) -> set[int]:
    skip: set[int] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.If):
            t = node.test
            name = t.id if isinstance(t, ast.Name) else getattr(t, "attr", None)
            if name == "TYPE_CHECKING":
                for sub in node.body:
                    for n in ast.walk(sub):
                        if hasattr(n, "lineno"):
                            skip.add(n.lineno)
    return skip


def imports_of(path: Path) -> list[tuple[int, str]]:
    """(line, absolute module name) of every clusterlab import in a file."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    skip = _type_checking_lines(tree)
    me = module_name(path).split(".")
    package = me if path.name == "__init__.py" else me[:-1]
    out: list[tuple[int, str]] = []
    for node in ast.walk(tree):
        if getattr(node, "lineno", None) in skip:
            continue
        if isinstance(node, ast.Import):
            out += [(node.lineno, a.name) for a in node.names if a.name.split(".")[0] == "clusterlab"]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package[: len(package) - node.level + 1]
                mod = ".".join(base + ([node.module] if node.module else []))
            else:
                mod = node.module or ""
            if mod.split(".")[0] != "clusterlab":
                continue
            # "from . import x" / "from .qm import engine" may name submodules
            for a in node.names:
                sub = f"{mod}.{a.name}"
                out.append((node.lineno, sub if _module_file(sub) is not None else mod))
    return out


def _module_file(name: str) -> Path | None:
    p = ROOT.joinpath(*name.split("."))
    if p.with_suffix(".py").is_file():
        return p.with_suffix(".py")
    if (p / "__init__.py").is_file():
        return p / "__init__.py"
    return None


MODULES = sorted(PKG.rglob("*.py"))


def test_the_table_parses_and_names_every_layer():
    table = layer_table()
    assert sorted(set(table.values())) == [0, 1, 2, 3, 4, 5]
    for pat in table:  # every entry names something that exists
        assert (PKG / pat).exists(), f"DEVELOPERS.md names {pat}, which is not in clusterlab/"


def test_every_module_has_a_layer():
    table = layer_table()
    missing = [p.relative_to(PKG).as_posix() for p in MODULES if layer_of(p, table) is None]
    assert not missing, f"modules with no layer in DEVELOPERS.md: {missing}"


@pytest.mark.parametrize("path", MODULES, ids=lambda p: p.relative_to(PKG).as_posix())
def test_no_import_reaches_up(path):
    table = layer_table()
    mine = layer_of(path, table)
    bad = []
    for line, mod in imports_of(path):
        target = _module_file(mod)
        assert target is not None, f"{path.name}:{line} imports {mod}, which does not exist"
        theirs = layer_of(target, table)
        if theirs is not None and theirs > mine:
            bad.append(f"line {line}: {mod} (layer {theirs})")
    assert not bad, f"{path.relative_to(PKG)} (layer {mine}) imports from a higher layer: {bad}"


def test_the_checker_catches_a_violation(tmp_path, monkeypatch):
    """The check itself can fail: a layer-1 kernel importing the store
    inside a function is reported."""
    fake = PKG / "electrostatics" / "_layer_probe.py"
    src = "def f():\n    from ..store import ResultStore\n    return ResultStore\n"
    fake.write_text(src, encoding="utf-8")
    try:
        table = layer_table()
        (line, mod), = imports_of(fake)
        assert mod == "clusterlab.store" and line == 2
        assert layer_of(_module_file(mod), table) > layer_of(fake, table)
    finally:
        fake.unlink()


#: PySCF modules a module outside qm/ may import: constants and element data
#: (no calculation), and pyscf.lib in blas.py (which loads the bundled OpenBLAS).
PYSCF_OUTSIDE_QM = {"pyscf.data", "pyscf.data.nist", "pyscf.data.elements", "pyscf.data.radii"}


def _pyscf_imports(path: Path) -> list[tuple[int, str]]:
    tree = ast.parse(path.read_text(encoding="utf-8"))
    out = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            out += [(node.lineno, a.name) for a in node.names if a.name.split(".")[0] == "pyscf"]
        elif isinstance(node, ast.ImportFrom) and not node.level and (node.module or "").split(".")[0] == "pyscf":
            out += [(node.lineno, f"{node.module}.{a.name}" if node.module == "pyscf" else node.module)
                    for a in node.names]
    return out


@pytest.mark.parametrize("path", [p for p in MODULES if not p.relative_to(PKG).as_posix().startswith("qm/")],
                         ids=lambda p: p.relative_to(PKG).as_posix())
def test_pyscf_calculations_only_through_the_quantum_door(path):
    """Outside qm/ nothing imports PySCF's SCF, response or integral code."""
    allowed = PYSCF_OUTSIDE_QM | ({"pyscf.lib"} if path.name == "blas.py" else set())
    bad = [f"line {n}: {m}" for n, m in _pyscf_imports(path) if m not in allowed]
    assert not bad, f"{path.relative_to(PKG)} imports PySCF outside the quantum engine: {bad}"
