"""Running trials with a controller and writing a run folder (rollouts, summary, plots)."""
from __future__ import annotations

import sys
from pathlib import Path

import numpy as np

from . import safety
from .records import save_figure_atomic, write_json_atomic
from .simulation import Setup
from .report import config_text, write_report
from .tables import EPISODE, METRIC_COLUMNS, cell, cells, metric_words
from .trial import TrialBatch


def run_trial(setup: Setup, controller, trial: int, rng: np.random.Generator, seed=None):
    """One trial of ``setup`` under ``controller``; returns ``(rollout, metrics)``.

    A shell over :class:`~muscle_sim.trial.TrialBatch` (one member, logged): a divergence or a
    hard stop fault ends the trial early; metrics then cover what ran and carry ``fault`` (and
    such a trial is never ``settled``).
    """
    core = TrialBatch(setup, 1, record=True)
    core.begin([0], [trial], [rng])
    core.read()
    controller.reset(setup)
    task = setup.task
    requested = np.zeros((1, 2))
    while not (core.terminated[0] or core.truncated[0]):
        k = int(core.k[0])
        # the logged reading (not the batch's live array): controllers may keep what they are given
        requested[0] = controller.command(k, k * task.dt, core.logged_reading(0))
        core.step(requested)
        core.read()
    rollout = core.rollout(0, controller=getattr(controller, "name", ""), seed=seed)
    metrics = core.metrics(0)
    # what the controller asked, before the valves limit it to [0, supply]: the rollout logs
    # the applied commands, these two say what was requested
    metrics["commands_above_rated"] = int(core.above_rated[0])
    metrics["peak_command_requested_kpa"] = float(core.peak_requested[0]) / 1e3
    return rollout, metrics


def command_cautions(setup: Setup, rows: list, label: str = "episode") -> list:
    """One caution per trial whose controller asked for more than the rated pressure."""
    rated = setup.rated_pressure
    return [f"CAUTION: {label} {r[label]} asked {r['commands_above_rated']} sample(s) above the rated pressure "
            f"{rated / 1e5:g} bar (peak {r['peak_command_requested_kpa'] / 100:.3g} bar); the simulated valves "
            f"applied at most the supply {setup.plant.pneumatics.supply_pressure / 1e5:g} bar. "
            + safety.over_rated(r["peak_command_requested_kpa"] / 100, rated / 1e5)
            for r in rows if r.get("commands_above_rated")]


def _progress(i: int, n: int, m: dict, stream) -> None:
    stream.write(f"episode {i + 1}/{n}: {metric_words(m)}, peak {cell(m['peak_pressure_kpa'], '.1f')} kPa\n")
    stream.flush()


def run_episodes(setup: Setup, controller, episodes: int, seed: int, out: Path, progress=sys.stderr) -> dict:
    """Run ``episodes`` trials (trial index = episode, so drift applies) and write the run folder:
    ``rollouts/episode-NNNN.csv``, ``episodes.png``, ``summary.json`` and ``report.html``; each
    file is written atomically."""
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
    png = plot_episodes(setup, controller.name, rollouts, out / "episodes.png")
    cautions = []
    if setup.over_rated:
        cautions.append(safety.over_rated(setup.plant.pneumatics.supply_pressure / 1e5, setup.rated_pressure / 1e5))
    cautions += command_cautions(setup, rows)
    summary = {"config": setup.config.source, "config_hash": setup.config.digest, "seed": seed,
               "controller": controller.name, "episodes": rows, "cautions": cautions, "safety": safety.GENERAL}
    write_json_atomic(out / "summary.json", summary)
    faults = [str(r["episode"]) for r in rows if r["fault"]]
    source = setup.config.source
    if faults:
        next_step = (f"episode(s) {', '.join(faults)} faulted: lower the commanded pressures or check the end "
                     "stops before running again")
    else:
        next_step = (f"learn a profile for this strike with `pamjoint tune {source}` (or plan one first with "
                     f"`pamjoint plan {source}`)")
    write_report(out, f"run of {source}: {episodes} episode(s) with {controller.name}, seed {seed}",
                 cells(rows, METRIC_COLUMNS, EPISODE), config_text(setup.config), cautions, next_step,
                 [(png, "episodes.png: joint angle of the episodes against the reference (top), measured "
                        "pressures and commands of the last episode, with the strike window enlarged on the right")])
    return summary


#: At most this many episodes are drawn in ``episodes.png`` (evenly picked; the title says which).
MAX_SHOWN = 8


def shown_episodes(n: int) -> list:
    """Indices of the episodes ``episodes.png`` draws: all up to :data:`MAX_SHOWN`, else evenly
    picked ones, the first and the last always among them."""
    if n <= MAX_SHOWN:
        return list(range(n))
    return sorted({int(round(i)) for i in np.linspace(0, n - 1, MAX_SHOWN)})


def plot_episodes(setup: Setup, controller: str, rollouts, path) -> Path:
    """``episodes.png``: the stacked trial figure of a run; its title names the episodes drawn."""
    from .plotting import new_figure, plot_trial_stack

    picks = shown_episodes(len(rollouts))
    fig, _ = new_figure(0, figsize=(11, 8))
    j = setup.plant.joint
    plot_trial_stack(fig, [rollouts[i] for i in picks], setup.task, (j.lower_stop, j.upper_stop),
                     setup.rated_pressure, labels=[f"episode {i}" for i in picks],
                     detail_label=f"episode {picks[-1]} (last of {len(rollouts)})")
    which = (f"all {len(rollouts)} episode(s)" if len(picks) == len(rollouts) else
             f"episodes {', '.join(map(str, picks))} of {len(rollouts)}")
    fig.suptitle(f"{setup.config.get('name') or 'run'}: {controller}, {which}", fontsize="medium")
    return save_figure_atomic(fig, path)
