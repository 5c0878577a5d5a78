"""Running trials with a controller and writing a run folder (rollouts, summary, plots)."""
from __future__ import annotations

import sys
from pathlib import Path

import numpy as np

from . import safety
from .errors import SimulationDiverged
from .records import save_figure_atomic, write_json_atomic
from .simulation import Setup, StrikeTrial
from .tables import cell, metric_words
from .tasks import strike_metrics


def run_trial(setup: Setup, controller, trial: int, rng: np.random.Generator, seed=None):
    """One trial of ``setup`` under ``controller``; returns ``(rollout, metrics)``.

    A divergence or a hard stop fault ends the trial early; metrics then cover what ran and carry
    ``fault``.
    """
    sim = StrikeTrial(setup)
    y = sim.start(rng, trial=trial)
    controller.reset(setup)
    task = setup.task
    fault = None
    limit = (setup.plant.joint.lower_stop - task.fault_depth, setup.plant.joint.upper_stop + task.fault_depth)
    while not sim.done:
        u = controller.command(sim.k, sim.k * task.dt, y)
        u = (min(max(float(u[0]), 0.0), sim.params.pneumatics.supply_pressure),
             min(max(float(u[1]), 0.0), sim.params.pneumatics.supply_pressure))
        try:
            y = sim.advance(u)
        except SimulationDiverged as exc:
            fault = f"simulation diverged: {exc}"
            break
        if not limit[0] <= sim.state[0] <= limit[1]:
            fault = "end stop struck deeper than task.fault_depth"
            break
    rollout = sim.rollout(controller=getattr(controller, "name", ""), seed=seed)
    metrics = strike_metrics(task, rollout.measured[:, 0], rollout.measured[:, 1], rollout.measured[:, 2:4])
    metrics["fault"] = fault
    metrics["commands_above_rated"] = int(np.count_nonzero(rollout.command > setup.rated_pressure))
    return rollout, metrics


def _progress(i: int, n: int, m: dict, stream) -> None:
    stream.write(f"episode {i + 1}/{n}: {metric_words(m)}, peak {cell(m['peak_pressure_kpa'], '.1f')} kPa\n")
    stream.flush()


def run_episodes(setup: Setup, controller, episodes: int, seed: int, out: Path, progress=sys.stderr) -> dict:
    """Run ``episodes`` trials (trial index = episode, so drift applies) and write the run folder:
    ``rollouts/episode-NNNN.csv``, ``angle.png``, ``pressures.png``, ``commands.png`` and last
    ``summary.json``; each file is written atomically."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from .plotting import plot_angle, plot_commands, plot_pressures

    out = Path(out)
    rng = np.random.default_rng(seed)
    rows, rollouts = [], []
    for i in range(episodes):
        rollout, metrics = run_trial(setup, controller, i, rng, seed)
        rollout.write_csv(out / "rollouts" / f"episode-{i:04d}.csv")
        rollouts.append(rollout)
        rows.append({"episode": i, **metrics})
        if progress is not None:
            _progress(i, episodes, metrics, progress)
    shown = rollouts if len(rollouts) <= 6 else rollouts[:: max(1, len(rollouts) // 6)]
    for name, draw in (("angle.png", lambda ax: plot_angle(shown, ax=ax)),
                       ("pressures.png", lambda ax: plot_pressures(rollouts[-1], ax=ax,
                                                                   rated_pressure=setup.rated_pressure)),
                       ("commands.png", lambda ax: plot_commands(rollouts[-1], ax=ax))):
        fig, ax = plt.subplots(figsize=(7, 4), layout="constrained")
        draw(ax)
        ax.set_title(f"{setup.config.get('name') or 'run'}: {controller.name}")
        save_figure_atomic(fig, out / name)
        plt.close(fig)
    cautions = []
    if setup.over_rated:
        cautions.append(safety.over_rated(setup.plant.pneumatics.supply_pressure / 1e5, setup.rated_pressure / 1e5))
    summary = {"config": setup.config.source, "config_hash": setup.config.digest, "seed": seed,
               "controller": controller.name, "episodes": rows, "cautions": cautions, "safety": safety.GENERAL}
    write_json_atomic(out / "summary.json", summary)
    return summary
