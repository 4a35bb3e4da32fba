"""The import direction of DEVELOPERS.md: physics never imports inference or pipeline."""

import ast
from importlib import resources

import pytest

PHYSICS = {"planck", "bands", "opacity", "models", "radiation", "priors", "_units", "errors"}
INFERENCE = {"likelihood", "fit", "equilibrium", "compare"}
PIPELINE = {"catalog", "config", "batch", "maps", "plots", "cli", "pipeline", "__main__"}


def _sedtemp_imports(path):
    tree = ast.parse(path.read_text())
    out = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom):
            if node.level and node.module:
                out.add(node.module.split(".")[0])
            elif node.level:
                out.update(a.name for a in node.names)
            elif node.module and node.module.startswith("sedtemp."):
                out.add(node.module.split(".")[1])
        elif isinstance(node, ast.Import):
            out.update(a.name.split(".")[1] for a in node.names if a.name.startswith("sedtemp."))
    return out


def _modules():
    root = resources.files("sedtemp")
    for p in root.iterdir():
        if p.name.endswith(".py"):
            yield p.name[:-3], p


@pytest.mark.parametrize("name, path", [(n, p) for n, p in _modules() if n in PHYSICS])
def test_physics_imports_no_inference_or_pipeline(name, path):
    bad = _sedtemp_imports(path) & (INFERENCE | PIPELINE)
    assert not bad, f"physics module {name} imports {bad}"


@pytest.mark.parametrize("name, path", [(n, p) for n, p in _modules() if n in INFERENCE])
def test_inference_imports_no_pipeline(name, path):
    bad = _sedtemp_imports(path) & PIPELINE
    assert not bad, f"inference module {name} imports {bad}"


def test_only_mcmc_imports_emcee():
    root = resources.files("sedtemp")
    users = []
    for p in list(root.iterdir()) + list((root / "fit").iterdir()):
        if p.name.endswith(".py") and "import emcee" in p.read_text():
            users.append(p.name)
    assert users == ["mcmc.py"]
