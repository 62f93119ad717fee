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
