"""The package's layers: a module imports only from its own layer or the layers below.

base < physics < trial < controllers < shells < face (see DEVELOPERS.md, "Layers"). The test
reads every module's imports (ast, module level and inside functions) and fails on an import that
points up, so the physics can never come to depend on a run folder, a controller or the CLI.
"""
import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]

LAYERS = {
    "base": ["muscle_sim.errors", "muscle_sim.units", "muscle_sim.compiled", "muscle_sim.threads",
             "muscle_sim.safety", "muscle_sim.yaml_input", "muscle_sim.tables"],
    "physics": ["muscle_sim.params", "muscle_sim.muscle", "muscle_sim.pneumatics", "muscle_sim.joint",
                "muscle_sim.hysteresis", "muscle_sim.plant", "muscle_sim.integrate", "muscle_sim.sensors",
                "muscle_sim.drift"],
    "trial": ["muscle_sim.tasks", "muscle_sim.config", "muscle_sim.records", "muscle_sim.simulation",
              "muscle_sim.trial", "muscle_sim.runs", "muscle_sim.plotting", "muscle_sim.render", "muscle_sim.scenarios",
              "muscle_sim.report"],
    "controllers": [f"controllers.{p.stem}" for p in sorted((ROOT / "controllers").glob("*.py"))
                    if p.stem != "__init__"],
    "shells": ["muscle_sim.env", "muscle_sim.vector_env", "muscle_sim.sb3_vec_env"],
    "face": ["muscle_sim.cli", "muscle_sim.muscle_map", "muscle_sim.joint_view", "muscle_sim.calibration",
             "muscle_sim.sweep"],
}
ORDER = list(LAYERS)
LAYER_OF = {module: ORDER.index(layer) for layer, modules in LAYERS.items() for module in modules}


def _imports(path: Path, module: str):
    """Project modules imported by ``module`` (absolute names)."""
    package = module.rsplit(".", 1)[0]
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            names = [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            base = package if node.level else ""
            target = f"{base}.{node.module}" if node.module and base else (node.module or base)
            names = [target] + [f"{target}.{a.name}" for a in node.names]
        else:
            continue
        for name in names:
            if name in LAYER_OF:
                yield name


def _modules():
    for pkg in ("muscle_sim", "controllers"):
        for path in sorted((ROOT / pkg).glob("*.py")):
            if path.stem != "__init__":
                yield f"{pkg}.{path.stem}", path


def test_every_module_has_a_layer():
    missing = [m for m, _ in _modules() if m not in LAYER_OF]
    assert not missing, f"give these modules a layer in tests/test_layers.py and DEVELOPERS.md: {missing}"


@pytest.mark.parametrize("module, path", list(_modules()), ids=lambda v: v if isinstance(v, str) else "")
def test_imports_point_down(module, path):
    own = LAYER_OF[module]
    up = sorted({name for name in _imports(path, module) if LAYER_OF[name] > own})
    assert not up, f"{module} ({ORDER[own]}) imports from a higher layer: {up}"
