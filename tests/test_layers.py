"""Imports go one way: core <- stages, io, quality <- pipeline <- dataset <- report <- cli.

Every module of the package is checked, whether its import sits at the top of the file or
inside a function, so a new module is covered by the subpackage it lives in.
"""
import ast
from pathlib import Path

import pytest

PKG = Path(__file__).resolve().parents[1] / "prep"
CORE = {"prep", "prep.errors", "prep.model", "prep.config", "prep.config.declare",
        "prep.config.signal", "prep.config.quality", "prep.config.labels", "prep.leads",
        "prep.evaluate", "prep.schema", "prep.demo", "prep.arrays"}

# subpackage (or top-level module) -> what its modules may import besides the core
ALLOWED = {
    "stages": {"stages"},   # only the shared helpers stages._*, never another stage (below)
    "io": {"io"},
    "quality": {"quality"},
    "pipeline": {"io", "stages", "quality", "pipeline"},
    "dataset": {"io", "stages", "quality", "pipeline", "dataset"},
    "report": {"io", "stages", "quality", "pipeline", "dataset", "report"},
    "cli": {"io", "stages", "quality", "pipeline", "dataset", "report", "cli"},
    "torch": {"dataset"},
}


def _modules():
    for f in sorted(PKG.rglob("*.py")):
        parts = f.relative_to(PKG.parent).with_suffix("").parts
        name = ".".join(parts[:-1] if parts[-1] == "__init__" else parts)
        yield name, f


def _imports(name: str, f: Path) -> set[str]:
    out = set()
    is_pkg = f.name == "__init__.py"
    for n in ast.walk(ast.parse(f.read_text())):
        if isinstance(n, ast.ImportFrom):
            if n.level:
                base = name.split(".") if is_pkg else name.split(".")[:-1]
                base = base[: len(base) - (n.level - 1)]
                mod = ".".join(base + ([n.module] if n.module else []))
            else:
                mod = n.module or ""
            if mod == "prep" or mod.startswith("prep."):
                out.add(mod)
                out.update(f"{mod}.{a.name}" for a in n.names
                           if (PKG.parent / f"{mod}.{a.name}".replace(".", "/")).with_suffix(
                               ".py").exists())
        elif isinstance(n, ast.Import):
            out.update(a.name for a in n.names if a.name.startswith("prep."))
    return out - {name}


def _room(mod: str) -> str:
    return mod.split(".")[1] if mod.count(".") >= 1 else ""


MODULES = dict(_modules())


@pytest.mark.parametrize("name", sorted(MODULES))
def test_imports_follow_the_layers(name):
    if name in CORE:
        allowed = set()
    else:
        room = _room(name)
        assert room in ALLOWED, f"{name}: a module outside the known rooms; add it to ALLOWED"
        allowed = ALLOWED[room]
    for mod in _imports(name, MODULES[name]):
        if mod in CORE or mod == "prep":
            continue
        rest = mod[len("prep."):]
        ok = any(rest == a or rest.startswith(a + ".") for a in allowed)
        assert ok, f"{name} imports {mod}"
        if name.startswith("prep.stages.") and not name.startswith("prep.stages._"):
            assert rest.startswith("stages._") or not rest.startswith("stages."), \
                f"stage {name} imports stage {mod}"


def test_no_import_cycles():
    # every import counts, deferred ones too: a cycle hidden inside a function is still one
    graph = {n: {m for m in _imports(n, f) if m in MODULES} for n, f in MODULES.items()}
    state: dict[str, int] = {}

    def visit(n, path):
        state[n] = 1
        for m in sorted(graph[n]):
            if m == "prep" or n == "prep":
                continue
            assert state.get(m) != 1, " -> ".join(path + [m])
            if m not in state:
                visit(m, path + [m])
        state[n] = 2
    for n in sorted(graph):
        if n not in state:
            visit(n, [n])
