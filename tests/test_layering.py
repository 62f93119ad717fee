"""The package layering of DEVELOPERS.md ("Layout and layering"), checked on the source: each
package imports only the packages below it (reconstruct < drivers < simulators < daemon)."""

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
ALLOWED = {  # folder -> maskrun packages its modules may import
    "reconstruct": {"reconstruct"},
    "drivers": {"drivers", "reconstruct"},
    "simulators": {"simulators", "drivers", "reconstruct"},
    "daemon": {"daemon", "simulators", "drivers", "reconstruct", "configs"},
}


def _maskrun_imports(path: Path) -> set[str]:
    """The maskrun packages a module imports (absolute imports; relative ones stay in the package)."""
    tree = ast.parse(path.read_text(), str(path))
    found = set()
    for node in ast.walk(tree):
        names = []
        if isinstance(node, ast.Import):
            names = [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
            names = [node.module]
        for name in names:
            parts = name.split(".")
            if parts[0] == "maskrun" and len(parts) > 1:
                found.add(parts[1])
    return found


@pytest.mark.parametrize("folder", sorted(ALLOWED))
def test_each_package_imports_only_the_layers_below_it(folder):
    wrong = {}
    for path in sorted((ROOT / folder).glob("*.py")):
        bad = _maskrun_imports(path) - ALLOWED[folder]
        if bad:
            wrong[path.name] = sorted(bad)
    assert not wrong, f"{folder}/ imports packages above it: {wrong}"


def test_reconstruct_needs_only_numerical_packages():
    # numpy and scipy; numba only for the fused kernels and pyfftw / mkl_fft only for the FFT backends,
    # which all have a numpy fallback; torch only in the optional deep image prior (the `neural` extra),
    # imported inside its function
    third_party = set()
    for path in (ROOT / "reconstruct").glob("*.py"):
        if path.name == "deep_prior.py":
            continue
        for node in ast.walk(ast.parse(path.read_text())):
            if isinstance(node, ast.Import):
                third_party |= {a.name.split(".")[0] for a in node.names}
            elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
                third_party.add(node.module.split(".")[0])
    import sys

    third_party -= set(sys.stdlib_module_names) | {"__future__"}
    assert third_party <= {"numpy", "scipy", "numba", "pyfftw", "mkl_fft"}, third_party


def test_the_deep_prior_imports_torch_only_when_called():
    import ast as _ast

    tree = _ast.parse((ROOT / "reconstruct" / "deep_prior.py").read_text())
    top = {a.name.split(".")[0] for n in tree.body if isinstance(n, _ast.Import) for a in n.names}
    top |= {n.module.split(".")[0] for n in tree.body if isinstance(n, _ast.ImportFrom) and n.level == 0 and n.module}
    assert "torch" not in top


def _daemon_imports(path: Path, modules: set[str]) -> set[str]:
    """The daemon modules one daemon module imports, at any depth in the file (imports inside functions
    count: a lazy import still ties the two modules together). Relative (``from .x import``, ``from . import
    x``) and absolute (``maskrun.daemon.x``) forms."""
    found = set()
    for node in ast.walk(ast.parse(path.read_text(), str(path))):
        if isinstance(node, ast.Import):
            for a in node.names:
                parts = a.name.split(".")
                if parts[:2] == ["maskrun", "daemon"] and len(parts) > 2:
                    found.add(parts[2])
        elif isinstance(node, ast.ImportFrom):
            if node.level == 1:
                base = node.module.split(".")[0] if node.module else None
            elif node.level == 0 and node.module and node.module.split(".")[:2] == ["maskrun", "daemon"]:
                parts = node.module.split(".")
                base = parts[2] if len(parts) > 2 else None
            else:
                continue
            if base is not None:
                found.add(base)
            else:  # from . import x, y / from maskrun.daemon import x, y
                found |= {a.name for a in node.names}
    return (found & modules) - {path.stem}


def _cycle(graph: dict[str, set[str]]) -> list[str]:
    """One import cycle of the graph as [a, b, ..., a], or [] when there is none (depth-first search)."""
    state: dict[str, int] = {}  # 1 on the current path, 2 done
    path: list[str] = []

    def visit(node: str) -> list[str]:
        state[node] = 1
        path.append(node)
        for nxt in sorted(graph.get(node, ())):
            if state.get(nxt) == 1:
                return path[path.index(nxt):] + [nxt]
            if nxt not in state:
                found = visit(nxt)
                if found:
                    return found
        path.pop()
        state[node] = 2
        return []

    for node in sorted(graph):
        if node not in state:
            found = visit(node)
            if found:
                return found
    return []


def test_no_two_daemon_modules_import_each_other():
    # a circle of imports (direct, or through other modules) between daemon/*.py, lazy imports included
    paths = sorted((ROOT / "daemon").glob("*.py"))
    modules = {p.stem for p in paths}
    graph = {p.stem: _daemon_imports(p, modules) for p in paths}
    assert not _cycle(graph), f"daemon modules import each other: {' -> '.join(_cycle(graph))}"


def test_the_cycle_check_finds_a_cycle():
    # self-check on made-up module names, so the test above can fail
    assert _cycle({"a": {"b"}, "b": {"c"}, "c": {"a"}}) == ["a", "b", "c", "a"]
    assert _cycle({"a": {"b"}, "b": {"c"}, "c": set()}) == []
