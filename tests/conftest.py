"""Shared fixtures: the demo setup and a strike-like command sequence that stays within the stops."""
from pathlib import Path

import numpy as np
import pytest

from muscle_sim.integrate import Stepper
from muscle_sim.plant import initial_state
from muscle_sim.simulation import Setup, home_pressures
from muscle_sim.tasks import reference

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "configs" / "flipper.yaml"
DRIFT = ROOT / "configs" / "flipper-drift.yaml"


def demo_config(**keys) -> dict:
    """The demo config as a dict with ``section__key`` entries replaced (``plant__sensors={}``:
    quiet sensors)."""
    import yaml

    raw = yaml.safe_load(DEMO.read_text(encoding="utf-8"))
    for path, value in keys.items():
        *head, last = path.split("__")
        node = raw
        for key in head:
            node = node[key]
        node[last] = value
    return raw


@pytest.fixture(scope="session")
def demo_setup():
    return Setup.from_config(DEMO)


def strike_commands(setup, n_steps=500, kp=2e5, kd=4e3):
    """Commands of a PD-plus-inertia tracker of the planned strike, recorded on the fixed-step
    plant; replayed open loop they give a strike that stays clear of the end stops."""
    p, task = setup.plant, setup.task
    hold = np.array(home_pressures(p, task))
    t = np.arange(n_steps) * task.dt
    r, rd, rdd = reference(task, t + 0.008)
    stepper = Stepper(p, task.dt, task.n_substeps)
    x0 = initial_state(p, task.home_angle, hold)
    stepper.reset(x0, hold)
    torque_per_pa = 6.4e-5   # rough r_p * 2 * area of the demo muscles [N m / Pa]
    cmd = []
    for k in range(n_steps):
        q, qd = stepper.x[0], stepper.x[1]
        d = p.joint.total_inertia * rdd[k] / torque_per_pa + kp * (r[k] - q) + kd * (rd[k] - qd)
        u = np.clip(hold + np.array([d, -d]), 0.0, p.pneumatics.supply_pressure)
        cmd.append(u)
        stepper.step(u)
    return x0, hold, np.array(cmd)


def check_report(folder, figures: int = 1) -> str:
    """Assert that ``folder/report.html`` is self-contained and complete; returns the page.

    No scripts and no external ``src``/``href``, at least ``figures`` embedded PNGs, the safety
    wording, a results table, the config and a next step."""
    import re

    from muscle_sim import safety

    page = (Path(folder) / "report.html").read_text(encoding="utf-8")
    assert page.startswith("<!DOCTYPE html>") and page.rstrip().endswith("</html>")
    assert "<script" not in page.lower()
    links = re.findall(r'(?:src|href)\s*=\s*"([^"]*)"', page, flags=re.I)
    assert all(link.startswith("data:image/png;base64,") for link in links), links
    assert not re.search(r'(?:src|href)\s*=\s*["\']?\s*(?:https?:|//)', page, flags=re.I)
    assert page.count('src="data:image/png;base64,') >= figures
    assert safety.GENERAL in page.replace("&#x27;", "'")
    assert "<table>" in page and "Config used" in page and 'class="next"' in page
    return page
