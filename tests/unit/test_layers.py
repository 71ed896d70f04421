"""The package's imports run one way: each module imports only from its own
layer or the layers below it, no set of modules imports each other in a
circle, and an import inside a function is a deliberate lazy load that says
so (a ``# lazy:`` comment on its line or on the import block it opens).

Read from the source with ``ast`` (nothing is imported), so a circle hidden
in a function-level import is found as surely as one at the top of a file.
A new module must be given its layer here, which is the point: placing it
is a decision.  DEVELOPERS.md draws the same layers.
"""
from __future__ import annotations

import ast
import sys
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[2] / "src" / "wavesweep"

# Bottom to top.  A module may import from its own layer and the layers below.
LAYERS = [
    ("foundation", ["_version", "errors", "registry", "units", "schema", "io.paths", "io.diskspace", "io.atomic"]),
    ("kernels", ["kernels", "kernels.*"]),
    ("numerics", ["grid", "fft", "fftw_rows", "sine_transform", "marginals", "hamiltonian", "potentials", "potentials.*", "eigen",
                  "absorbers", "absorbers.*", "interaction", "imaginary_time", "frame", "surfaces", "states", "propagators", "propagators.*", "observables", "volkov"]),
    ("adequacy", ["adequacy"]),
    ("job", ["job", "job.*"]),
    ("io", ["io", "io.record", "io.results", "io.recorder", "io.checkpoint"]),
    ("run", ["setup", "run", "batched", "study"]),
    ("analysis", ["analysis", "analysis.*"]),
    ("checks", ["check", "pilot"]),
    ("studies", ["studies", "studies.*"]),
    ("viz", ["viz", "viz.*"]),
    ("interface", ["cli", "__main__", ""]),      # "" is the package itself (wavesweep/__init__.py)
]


def _module_name(path: Path) -> str:
    parts = list(path.relative_to(PACKAGE).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(parts)


def _layer_of(module: str) -> int:
    for rank, (_, patterns) in enumerate(LAYERS):
        for pattern in patterns:
            if module == pattern or (pattern.endswith(".*") and module.startswith(pattern[:-1])):
                return rank
    raise KeyError(module)


def _modules() -> dict[str, Path]:
    return {_module_name(p): p for p in sorted(PACKAGE.rglob("*.py"))}


def _imports(path: Path, module: str, known: set[str]):
    """``(target module, line, inside a function, statement)`` for each
    import of a module of the package."""
    tree = ast.parse(path.read_text())
    package = module if path.name == "__init__.py" else module.rpartition(".")[0]
    inside = set()
    for fn in ast.walk(tree):
        if isinstance(fn, (ast.FunctionDef, ast.AsyncFunctionDef)):
            inside |= {id(n) for n in ast.walk(fn) if isinstance(n, (ast.Import, ast.ImportFrom))}
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names = [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".") if package else []
                base = base[:len(base) - (node.level - 1)]
                stem = ".".join(base + ([node.module] if node.module else []))
                names = [stem] + [f"{stem}.{a.name}".lstrip(".") for a in node.names]
            else:
                names = [node.module] + [f"{node.module}.{a.name}" for a in node.names]
        else:
            continue
        targets = set()
        for name in names:
            if node.level == 0 if isinstance(node, ast.ImportFrom) else True:
                if not (name == "wavesweep" or name.startswith("wavesweep.")):
                    continue
                name = name[len("wavesweep."):] if name != "wavesweep" else ""
            if name in known and name != module:
                targets.add(name)
        for target in targets:
            yield target, node.lineno, id(node) in inside, ast.unparse(node)


def _graph():
    modules = _modules()
    known = set(modules)
    return modules, {m: list(_imports(p, m, known)) for m, p in modules.items()}


def test_every_module_has_a_layer():
    unplaced = [m or "wavesweep/__init__.py" for m in _modules() if _safe_layer(m) is None]
    assert not unplaced, f"give these modules a layer in tests/unit/test_layers.py: {unplaced}"


def _safe_layer(module):
    try:
        return _layer_of(module)
    except KeyError:
        return None


def test_no_import_runs_up_a_layer():
    modules, graph = _graph()
    upward = []
    for module, edges in graph.items():
        here = _safe_layer(module)
        for target, line, _, text in edges:
            there = _safe_layer(target)
            if here is not None and there is not None and there > here:
                upward.append(f"{modules[module].relative_to(PACKAGE.parent)}:{line} ({LAYERS[here][0]}) "
                              f"imports {target} ({LAYERS[there][0]}): {text}")
    assert not upward, "imports that run up a layer:\n" + "\n".join(upward)


def test_no_circle_of_imports():
    """Tarjan's strongly connected components (Tarjan, SIAM J. Comput. 1,
    146 (1972)): any component of more than one module is a circle,
    function-level imports included."""
    _, graph = _graph()
    edges = {m: sorted({t for t, *_ in e}) for m, e in graph.items()}
    index, low, stack, on_stack, circles = {}, {}, [], set(), []
    counter = [0]
    sys.setrecursionlimit(max(sys.getrecursionlimit(), 10_000))

    def visit(v):
        index[v] = low[v] = counter[0]
        counter[0] += 1
        stack.append(v)
        on_stack.add(v)
        for w in edges[v]:
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on_stack:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            component = []
            while True:
                w = stack.pop()
                on_stack.discard(w)
                component.append(w)
                if w == v:
                    break
            if len(component) > 1:
                circles.append(sorted(component))

    for v in edges:
        if v not in index:
            visit(v)
    assert not circles, f"modules that import each other in a circle: {circles}"


def _says_lazy(lines: list[str], lineno: int) -> bool:
    """A ``# lazy`` comment on the import's own lines or on the block of
    imports and comments directly above it (one comment may open a block)."""
    i = lineno - 1
    if "# lazy" in lines[i]:
        return True
    i -= 1
    while i >= 0:
        text = lines[i].strip()
        if "# lazy" in text:
            return True
        if not (text.startswith(("import ", "from ", "#")) or text.endswith((",", "(")) or text.endswith(")")):
            return False
        i -= 1
    return False


def test_function_level_imports_are_deliberate_lazy_loads():
    bare = []
    for module, path in _modules().items():
        text = path.read_text()
        lines = text.split("\n")
        for fn in ast.walk(ast.parse(text)):
            if not isinstance(fn, (ast.FunctionDef, ast.AsyncFunctionDef)):
                continue
            for node in ast.walk(fn):
                if isinstance(node, (ast.Import, ast.ImportFrom)) and not _says_lazy(lines, node.lineno):
                    bare.append(f"{path.relative_to(PACKAGE.parent)}:{node.lineno}: {ast.unparse(node)}")
    assert not bare, ("imports inside functions without a '# lazy:' reason (move them to the top of the "
                      "module, or say why they load late):\n" + "\n".join(sorted(set(bare))))


@pytest.mark.parametrize("lines, lineno, expected", [
    (["x = 1", "    import json"], 2, False),
    (["    # lazy: heavy", "    import xarray as xr", "    from .a import b"], 3, True),
    (["    y = 2", "    from .a import b   # lazy: only here"], 2, True),
])
def test_the_lazy_rule_reads_comments_as_meant(lines, lineno, expected):
    assert _says_lazy(lines, lineno) is expected


def test_a_circle_and_an_upward_import_are_caught(tmp_path, monkeypatch):
    """The checks can fail: a miniature package with a circle (a <-> b, one
    side hidden in a function) and an upward import (the grid importing the
    CLI) is caught by both."""
    pkg = tmp_path / "wavesweep"
    pkg.mkdir()
    (pkg / "__init__.py").write_text("")
    (pkg / "grid.py").write_text("from .cli import main\n")
    (pkg / "cli.py").write_text("def main():\n    pass\n")
    (pkg / "fft.py").write_text("from . import hamiltonian\n")
    (pkg / "hamiltonian.py").write_text("def f():\n    from .fft import g  # lazy: test\n")
    monkeypatch.setattr(sys.modules[__name__], "PACKAGE", pkg)
    with pytest.raises(AssertionError, match="grid.py:1"):
        test_no_import_runs_up_a_layer()
    with pytest.raises(AssertionError, match="fft"):
        test_no_circle_of_imports()
