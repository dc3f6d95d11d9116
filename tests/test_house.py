"""The package's structure, read from its source: public names declared, imports without
cycles, nothing taken from a module that keeps it private."""

from __future__ import annotations

import ast
import importlib
from pathlib import Path

PKG = Path(__file__).resolve().parents[1] / "optimizer"


def _modules() -> dict[str, Path]:
    out = {}
    for f in sorted(PKG.rglob("*.py")):
        if "__pycache__" in f.parts:
            continue
        parts = ["optimizer", *f.relative_to(PKG).with_suffix("").parts]
        if parts[-1] == "__init__":
            parts.pop()
        out[".".join(parts)] = f
    return out


MODULES = _modules()


def _declared(f: Path) -> list[str] | None:
    for n in ast.parse(f.read_text()).body:
        if isinstance(n, ast.Assign) and any(
            isinstance(t, ast.Name) and t.id == "__all__" for t in n.targets
        ):
            return list(ast.literal_eval(n.value))
    return None


def _imports(name: str, f: Path) -> list[tuple[str, list[str]]]:
    """(module, names) of every ``from ... import`` in the file, at any depth."""
    is_pkg = f.name == "__init__.py"
    here = name.split(".") if is_pkg else name.split(".")[:-1]
    out = []
    for n in ast.walk(ast.parse(f.read_text())):
        if isinstance(n, ast.ImportFrom):
            if n.level:
                base = here[: len(here) - (n.level - 1)]
                mod = ".".join(base + ([n.module] if n.module else []))
            else:
                mod = n.module or ""
            out.append((mod, [a.name for a in n.names]))
        elif isinstance(n, ast.Import):
            out += [(a.name, []) for a in n.names]
    return out


def test_every_module_declares_its_public_names_and_they_exist() -> None:
    for name, f in MODULES.items():
        if name == "optimizer.__main__":
            continue
        declared = _declared(f)
        assert declared is not None, f"{f} has no __all__"
        assert len(set(declared)) == len(declared), f"{f}: a name twice in __all__"
        module = importlib.import_module(name)
        missing = [x for x in declared if not hasattr(module, x)]
        assert not missing, f"{f}: __all__ names what it does not define: {missing}"


def test_no_module_takes_a_name_another_keeps_out_of_its_public_names() -> None:
    bad = []
    for name, f in MODULES.items():
        for mod, names in _imports(name, f):
            if mod not in MODULES or mod == name:
                continue
            public = set(_declared(MODULES[mod]) or ())
            for x in names:
                if x.startswith("_") or x in public or f"{mod}.{x}" in MODULES:
                    continue
                if x == "__version__":
                    continue
                bad.append(f"{f.relative_to(PKG)}: {x} from {mod}")
    assert not bad, bad


def test_the_import_graph_has_no_cycles() -> None:
    """Imports inside functions count too (they are cycles put off, not avoided)."""
    graph: dict[str, set[str]] = {}
    for name, f in MODULES.items():
        deps = set()
        for mod, names in _imports(name, f):
            if mod in MODULES:
                subs = {f"{mod}.{x}" for x in names if f"{mod}.{x}" in MODULES}
                deps |= subs
                if len(subs) < len(names):  # a name of the module itself
                    deps.add(mod)
        parent = name.rsplit(".", 1)[0]
        deps.discard(name)
        if not MODULES[name].name == "__init__.py":
            deps.discard(parent)  # a package's __init__ runs first anyway
        graph[name] = deps
    state: dict[str, int] = {}
    path: list[str] = []

    def visit(m: str) -> None:
        state[m] = 1
        path.append(m)
        for d in graph[m]:
            if state.get(d) == 1:
                raise AssertionError("import cycle: " + " -> ".join([*path[path.index(d):], d]))
            if d not in state:
                visit(d)
        path.pop()
        state[m] = 2

    for m in graph:
        if m not in state:
            visit(m)
