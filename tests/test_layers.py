"""The import contract: arrows between the package's modules point down the data flow, never up.

The order below is the flow a reader should see (model -> gates -> evolve -> readout -> driver -> runner/store ->
analysis -> report/plots -> cli). A module may import only modules listed before it; every import counts, also
the ones inside functions. A new module must be placed in this list (the test fails until it is).
"""

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "mpo_fronts"

LAYERS = [
    "conventions", "errors",                       # shared constants and the error hierarchy
    "models", "pauli", "schedules", "truncation",  # chain -> gates, Trotter schedules, truncation routes
    "settings", "stepsize", "evolve", "u1",        # Trotter error and step; the engines
    "readout", "driver", "references", "exact",    # measurements, the one evolution loop, exact references
    "config",                                      # run descriptions
    "atomic", "rundir", "results", "store",        # the on-disk layout
    "stopping", "ensemble",                        # signals; executors
    "analysis", "growth", "trust",                 # statistics, fits, trust selection
    "workflows", "report",                         # check and convergence study; summaries
    "plots", "cli", "__init__",                    # figures, command line, package namespace
]
KERNELS = ("pauli", "schedules", "truncation", "settings", "stepsize", "evolve", "u1", "readout", "driver", "exact",
           "references")
RUNNER = ("config", "atomic", "rundir", "results", "store", "stopping", "ensemble", "workflows", "analysis",
          "growth", "trust", "report", "plots", "cli", "__init__")


def _modules():
    return sorted(p.stem for p in PACKAGE.glob("*.py"))


def _imports(name: str) -> set[str]:
    """Package modules that ``name`` imports (relative or absolute, at any depth of the file)."""
    tree = ast.parse((PACKAGE / f"{name}.py").read_text())
    out = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom):
            if node.level == 1 and node.module:
                out.add(node.module.split(".")[0])
            elif node.level == 1:  # from . import x
                out.update(a.name for a in node.names if (PACKAGE / f"{a.name}.py").exists())
                if any(not (PACKAGE / f"{a.name}.py").exists() for a in node.names):
                    out.add("__init__")
            elif node.module and node.module.split(".")[0] == "mpo_fronts":
                parts = node.module.split(".")
                out.add(parts[1] if len(parts) > 1 else "__init__")
        elif isinstance(node, ast.Import):
            for a in node.names:
                parts = a.name.split(".")
                if parts[0] == "mpo_fronts":
                    out.add(parts[1] if len(parts) > 1 else "__init__")
    out.discard(name)
    return out


def test_every_module_has_a_place_in_the_layers():
    missing = [m for m in _modules() if m not in LAYERS]
    assert not missing, f"place these modules in tests/test_layers.py LAYERS: {missing}"


@pytest.mark.parametrize("name", _modules())
def test_imports_point_down(name):
    if name not in LAYERS:
        pytest.skip("not placed yet (see the test above)")
    rank = LAYERS.index(name)
    up = sorted(m for m in _imports(name) if m in LAYERS and LAYERS.index(m) > rank)
    assert not up, f"{name} imports {up}, which come after it in the layers"


@pytest.mark.parametrize("name", [k for k in KERNELS if (PACKAGE / f"{k}.py").exists()])
def test_kernels_do_no_io_and_never_import_the_runner(name):
    src = (PACKAGE / f"{name}.py").read_text()
    assert not (_imports(name) & set(RUNNER)), f"kernel {name} imports the runner/store/CLI"
    tree = ast.parse(src)
    calls = {n.func.id for n in ast.walk(tree) if isinstance(n, ast.Call) and isinstance(n.func, ast.Name)}
    assert not calls & {"print", "open"}, f"kernel {name} prints or opens files"


def test_the_checker_sees_an_upward_import(tmp_path, monkeypatch):
    # the contract can fail: a kernel that imports the store is reported
    fake = tmp_path / "mpo_fronts"
    fake.mkdir()
    (fake / "evolve.py").write_text("def f():\n    from .store import load\n    from . import __version__\n")
    monkeypatch.setattr(__import__(__name__), "PACKAGE", fake)
    assert _imports("evolve") == {"store", "__init__"}
