"""Side-by-side comparison of model-only, feedback and learned control on one plant and seed."""
from __future__ import annotations

from pathlib import Path

import numpy as np

from muscle_sim import safety
from muscle_sim.records import save_figure_atomic, write_json_atomic, write_text_atomic
from muscle_sim.runs import run_trial
from muscle_sim.threads import single_blas_thread

from .base import PressureProfile
from .tuning import METRIC_KEYS, trial_rng, tune

EVALUATION_TRIAL_OFFSET = 1_000_000   # seeds the evaluation trial apart from the learning trials


def _evaluate(setup, controller, trial: int, seed: int):
    rollout, metrics = run_trial(setup, controller, trial, trial_rng(seed, EVALUATION_TRIAL_OFFSET + trial), seed)
    return rollout, metrics


@single_blas_thread
def compare(setup, trials: int, seed: int, out, method: str = "norm-optimal", progress=None) -> dict:
    """Learn for ``trials`` trials (with ``method`` and with SPSA), then run every controller once on
    the same plant (as it is after those trials, drift included) with the same noise seed."""
    from .feedback import PIDController
    from .feedforward import FeedforwardController, model_only_profile

    out = Path(out)
    ff = model_only_profile(setup)
    learned_summary = tune(setup, method, trials, seed, out / "learned")
    spsa_summary = tune(setup, "spsa", trials, seed, out / "spsa")
    learned = PressureProfile.read_csv(out / "learned" / "final_profile.csv")
    spsa = PressureProfile.read_csv(out / "spsa" / "final_profile.csv")
    candidates = {
        "model-only": FeedforwardController(ff, name="model-only"),
        "feedback": PIDController(name="feedback"),
        "model-only+feedback": PIDController(feedforward=ff, name="model-only+feedback"),
        "learned": FeedforwardController(learned, name="learned"),
        "learned+feedback": PIDController(feedforward=learned, name="learned+feedback"),
        "spsa": FeedforwardController(spsa, name="spsa"),
    }
    results, rollouts = {}, {}
    for name, controller in candidates.items():
        rollout, metrics = _evaluate(setup, controller, trials, seed)
        rollouts[name] = rollout
        results[name] = {k: metrics[k] for k in METRIC_KEYS} | {"settle_time_s": metrics["settle_time_s"],
                                                                 "fault": metrics["fault"]}
        rollout.write_csv(out / "rollouts" / f"{name}.csv")
        if progress is not None:
            progress(name, results[name])
    data = {"config": setup.config.source, "config_hash": setup.config.digest, "seed": seed,
            "learning_trials": trials, "method": method, "evaluated_trial": trials,
            "learned_best_trial": learned_summary["best_trial"], "spsa_best_trial": spsa_summary["best_trial"],
            "controllers": results, "safety": safety.GENERAL + " " + safety.HARDWARE}
    write_text_atomic(out / "comparison.md", comparison_table(data))
    _plots(setup, rollouts, out)
    write_json_atomic(out / "comparison.json", data)
    return data


def comparison_table(data: dict) -> str:
    """Markdown table of the comparison (one row per controller)."""
    lines = [f"Comparison on `{data['config']}` (seed {data['seed']}, {data['learning_trials']} learning trials, "
             f"method {data['method']}); evaluated on trial {data['evaluated_trial']}.", "",
             "| controller | swing RMS [deg] | strike angle error [deg] | strike speed error [%] | peak pressure [kPa] |",
             "|---|---:|---:|---:|---:|"]
    for name, m in data["controllers"].items():
        cells = [m[k] for k in METRIC_KEYS]
        text = [f"{v:.3f}" if isinstance(v, float) and np.isfinite(v) else "n/a" for v in cells]
        lines.append(f"| {name} | " + " | ".join(text) + " |" + (f" fault: {m['fault']}" if m.get("fault") else ""))
    return "\n".join(lines) + "\n"


def _plots(setup, rollouts: dict, out: Path) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from muscle_sim.plotting import plot_angle

    names = list(rollouts)
    fig, ax = plt.subplots(figsize=(8, 4.5), layout="constrained")
    plot_angle([rollouts[n] for n in names], ax=ax, labels=names)
    ax.axvline(setup.task.strike_time, color="0.5", lw=0.8, ls=":")
    ax.set_title("joint angle: learned against model-only control")
    save_figure_atomic(fig, out / "overlay_angle.png")
    plt.close(fig)
    fig, ax = plt.subplots(figsize=(8, 4.5), layout="constrained")
    for n in names:
        r = rollouts[n]
        ax.plot(r.t, np.degrees(r.measured[:, 0] - r.reference), label=n, lw=1)
    ax.set_xlabel("time [s]")
    ax.set_ylabel("tracking error [deg]")
    ax.legend(fontsize="small")
    save_figure_atomic(fig, out / "overlay_error.png")
    plt.close(fig)
