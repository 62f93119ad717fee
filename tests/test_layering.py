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
    for path in sorted((ROOT / folder).glob("**/*.py")):
        bad = _maskrun_imports(path) - ALLOWED[folder]
        if bad:
            wrong[str(path.relative_to(ROOT / folder))] = sorted(bad)
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


def _daemon_modules() -> dict[str, Path]:
    """Every daemon module by its dotted path under maskrun.daemon ("config", "record.store", ...)."""
    found = {}
    for path in sorted((ROOT / "daemon").glob("**/*.py")):
        parts = list(path.relative_to(ROOT / "daemon").with_suffix("").parts)
        if parts[-1] == "__init__":
            continue
        found[".".join(parts)] = path
    return found


def _daemon_imports(path: Path, name: str, modules: set[str]) -> set[str]:
    """The daemon modules (dotted paths under maskrun.daemon) one daemon module imports, at any depth in the
    file (imports inside functions count: a lazy import still ties the two modules together). Relative
    (``from .x import``, ``from . import x``, ``from ..record.store import``) and absolute
    (``maskrun.daemon.record.store``) forms."""
    package = name.split(".")[:-1]  # the module's sub-package under maskrun.daemon ([] at the ground)
    found = set()
    for node in ast.walk(ast.parse(path.read_text(), str(path))):
        if isinstance(node, ast.Import):
            bases = [a.name.split(".") for a in node.names]
            for parts in bases:
                if parts[:2] == ["maskrun", "daemon"] and len(parts) > 2:
                    found.add(".".join(parts[2:]))
            continue
        if not isinstance(node, ast.ImportFrom):
            continue
        if node.level:
            if node.level - 1 > len(package):
                continue  # above maskrun.daemon (e.g. ``from ...drivers import``)
            base = package[:len(package) - (node.level - 1)] + (node.module.split(".") if node.module else [])
        elif node.module and node.module.split(".")[:2] == ["maskrun", "daemon"]:
            base = node.module.split(".")[2:]
        else:
            continue
        found.add(".".join(base))
        found |= {".".join(base + [a.name]) for a in node.names}  # from <package> import <module>
    return (found & modules) - {name}


def _subpackage(module: str) -> str:
    """The daemon sub-package of a module's dotted path; the modules directly in daemon/ are the ground."""
    return module.split(".")[0] if "." in module else "ground"


def _daemon_graph() -> dict[str, set[str]]:
    modules = _daemon_modules()
    return {name: _daemon_imports(path, name, set(modules)) for name, path in modules.items()}


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
    # a circle of imports (direct, or through other modules) between the daemon modules of every sub-package,
    # lazy imports included
    graph = _daemon_graph()
    assert len(graph) > 70  # the glob reaches into the sub-packages
    assert not _cycle(graph), f"daemon modules import each other: {' -> '.join(_cycle(graph))}"


def test_the_cycle_check_finds_a_cycle():
    # self-check on made-up module names, so the test above can fail
    assert _cycle({"a": {"b"}, "b": {"c"}, "c": {"a"}}) == ["a", "b", "c", "a"]
    assert _cycle({"a": {"b"}, "b": {"c"}, "c": set()}) == []


# The daemon's sub-packages (DEVELOPERS.md, "The daemon's sub-packages"): each imports only the sub-packages
# named here; the ground (config, security, masks, laser_hazard, errors, directly in daemon/) is importable by
# all and imports only itself. Data flows one way: config -> safety -> record -> calibrate / compute / offline
# -> acquire -> service; the displays (show) only read; commands sit on top.
SUBPACKAGES_ALLOWED = {
    "ground": set(),
    "safety": {"ground"},
    "record": {"ground"},
    "calibrate": {"ground", "safety"},
    "compute": {"ground", "record"},
    "offline": {"ground", "record"},
    "acquire": {"ground", "safety", "record", "calibrate", "compute", "offline"},
    "service": {"ground", "safety", "record", "acquire"},
    "show": {"ground", "safety", "record", "calibrate"},
    "commands": {"ground", "safety", "record", "calibrate", "compute", "offline", "acquire", "service", "show"},
}
MAX_LINES = 420
OVER_MAX_LINES: set[str] = set()  # daemon modules allowed past MAX_LINES (dotted path and why); none today


def _backward_imports(graph: dict[str, set[str]], allowed: dict[str, set[str]]) -> list[str]:
    """The imports "a -> b" between two sub-packages that the table does not allow."""
    wrong = []
    for module, imported in sorted(graph.items()):
        here = _subpackage(module)
        for other in sorted(imported):
            there = _subpackage(other)
            if there != here and there not in allowed.get(here, set()):
                wrong.append(f"{module} -> {other}")
    return wrong


def test_every_daemon_module_is_in_a_known_subpackage():
    assert {_subpackage(m) for m in _daemon_graph()} <= set(SUBPACKAGES_ALLOWED)
    assert {p.name for p in (ROOT / "daemon").iterdir() if p.is_dir() and p.name != "__pycache__"} \
        == set(SUBPACKAGES_ALLOWED) - {"ground"}


def test_the_subpackage_table_flows_one_way():
    # the table itself has no circle: no two sub-packages may import each other, even through a third
    assert not _cycle(SUBPACKAGES_ALLOWED), _cycle(SUBPACKAGES_ALLOWED)


def test_each_daemon_subpackage_imports_only_the_ones_it_may():
    wrong = _backward_imports(_daemon_graph(), SUBPACKAGES_ALLOWED)
    assert not wrong, f"daemon imports against the flow of SUBPACKAGES_ALLOWED: {wrong}"


def test_the_backward_import_check_finds_one():
    # self-check on made-up module names, so the test above can fail
    graph = {"config": set(), "record.store": {"config"}, "acquire.bench": {"record.store"},
             "record.runfile": {"acquire.bench"}}
    rules = {"ground": set(), "record": {"ground"}, "acquire": {"ground", "record"}}
    assert _backward_imports(graph, rules) == ["record.runfile -> acquire.bench"]
    del graph["record.runfile"]
    assert _backward_imports(graph, rules) == []


def test_the_import_graph_follows_relative_and_package_imports(tmp_path):
    mod = tmp_path / "m.py"
    mod.write_text("from ..record.store import A\nfrom maskrun.daemon.offline import reprocess_task\n"
                   "def f():\n    from .sequencer import B\n")
    found = _daemon_imports(mod, "acquire.m", {"record.store", "offline.reprocess_task", "acquire.sequencer"})
    assert found == {"record.store", "offline.reprocess_task", "acquire.sequencer"}


def test_daemon_modules_stay_short():
    long = {name: n for name, path in _daemon_modules().items()
            if (n := len(path.read_text().splitlines())) > MAX_LINES and name not in OVER_MAX_LINES}
    assert not long, f"daemon modules over {MAX_LINES} lines (split them along a seam): {long}"


def _flat_package_graph(folder: str) -> dict[str, set[str]]:
    """Module -> modules of the same flat package it imports (relative or ``maskrun.<folder>.x``; lazy
    imports inside functions count, as for the daemon)."""
    paths = {p.stem: p for p in sorted((ROOT / folder).glob("*.py"))}
    graph = {}
    for stem, path in paths.items():
        found = set()
        for node in ast.walk(ast.parse(path.read_text(), str(path))):
            if isinstance(node, ast.Import):
                found |= {a.name.split(".")[2] for a in node.names
                          if a.name.split(".")[:2] == ["maskrun", folder] and len(a.name.split(".")) > 2}
            elif isinstance(node, ast.ImportFrom):
                parts = node.module.split(".") if node.module else []
                if node.level == 1:
                    base = parts[:1]
                elif node.level == 0 and parts[:2] == ["maskrun", folder]:
                    base = parts[2:3]
                else:
                    continue
                found |= set(base) if base else {a.name for a in node.names}
        graph[stem] = (found & set(paths)) - {stem}
    return graph


@pytest.mark.parametrize("folder", ["reconstruct", "drivers", "simulators"])
def test_no_two_modules_of_a_flat_package_import_each_other(folder):
    graph = _flat_package_graph(folder)
    assert graph and not _cycle(graph), f"{folder}/ modules import each other: {' -> '.join(_cycle(graph))}"
