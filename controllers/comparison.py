"""Side-by-side comparison of model-only, feedback and learned control on one plant and seed."""
from __future__ import annotations

from pathlib import Path

import numpy as np

from muscle_sim import safety
from muscle_sim.errors import DataError, SimulationDiverged
from muscle_sim.records import read_log, save_figure_atomic, write_json_atomic, write_text_atomic
from muscle_sim.runs import run_trial
from muscle_sim.tables import CONTROLLER, METRIC_COLUMNS, markdown_table
from muscle_sim.threads import single_blas_thread

from .base import PressureProfile
from .tuning import METRIC_KEYS, trial_rng, tune

EVALUATION_TRIAL_OFFSET = 1_000_000   # seeds the evaluation trial apart from the learning trials
#: How many of the last learning trials the feedback's prior is identified from: the most recent
#: one, the plant as it is evaluated (drift included); more trials of a converged learner repeat
#: the same swing and cost a few seconds each to fit.
IDENTIFICATION_TRIALS = 1


def feedback_prior(setup, rollouts) -> tuple:
    """The prior to place the feedback gains on, and a JSON-ready note of where it came from.

    With logged ``rollouts`` the prior is identified from them
    (:func:`controllers.identification.update_prior`), also when the fit stopped at its evaluation
    limit having lowered the residual (the note keeps its status and message); without logs, or
    when the identification fails, it is the configured ``setup.prior``.
    """
    from .identification import update_prior

    if not rollouts:
        return setup.prior, {"prior": "configured", "identification": None}
    try:
        prior, result = update_prior(setup, rollouts)
    except (DataError, SimulationDiverged) as exc:
        return setup.prior, {"prior": "configured", "identification": {"success": False, "message": str(exc)}}
    summary = result.to_dict()
    improved = result.status == 0 and result.residual_rms < result.residual_rms_before
    if not (result.success or improved):
        return setup.prior, {"prior": "configured", "identification": summary}
    return prior, {"prior": "identified", "identification": summary}


def _learned_logs(setup, folder: Path, trials: int) -> tuple:
    """The last :data:`IDENTIFICATION_TRIALS` trial logs of a tune run folder, read as a rig log is,
    with their trial numbers."""
    picks = list(range(max(0, trials - IDENTIFICATION_TRIALS), trials))
    return [read_log(folder / "rollouts" / f"trial-{i:04d}.csv", setup.task, allow_short=True) for i in picks], picks


def _evaluate(setup, controller, trial: int, seed: int):
    rollout, metrics = run_trial(setup, controller, trial, trial_rng(seed, EVALUATION_TRIAL_OFFSET + trial), seed)
    return rollout, metrics


@single_blas_thread
def compare(setup, trials: int, seed: int, out, method: str = "norm-optimal", progress=None) -> dict:
    """Learn for ``trials`` trials (with ``method`` and with SPSA), then run every controller once on
    the same plant (as it is after those trials, drift included) with the same noise seed.

    The feedback gains are placed on the prior identified from the last learning trial (see
    :func:`feedback_prior`) where the config's ``feedback`` section leaves them unset; ``feedback``
    in the result says which prior they came from and which gains ran."""
    from .feedback import PIDController
    from .feedforward import FeedforwardController, model_only_profile

    out = Path(out)
    ff = model_only_profile(setup)
    learned_summary = tune(setup, method, trials, seed, out / "learned")
    spsa_summary = tune(setup, "spsa", trials, seed, out / "spsa")
    learned = PressureProfile.read_csv(out / "learned" / "final_profile.csv")
    spsa = PressureProfile.read_csv(out / "spsa" / "final_profile.csv")
    logs, picked = _learned_logs(setup, out / "learned", len(learned_summary["trials"]))
    prior, feedback = feedback_prior(setup, logs)
    feedback["identified_from_trials"] = picked if feedback["prior"] == "identified" else []
    candidates = {
        "model-only": FeedforwardController(ff, name="model-only"),
        "feedback": PIDController(name="feedback", prior=prior),
        "model-only+feedback": PIDController(feedforward=ff, name="model-only+feedback", prior=prior),
        "learned": FeedforwardController(learned, name="learned"),
        "learned+feedback": PIDController(feedforward=learned, name="learned+feedback", prior=prior),
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
    feedback["gains"] = candidates["feedback"].design.to_dict()
    data = {"config": setup.config.source, "config_hash": setup.config.digest, "seed": seed,
            "learning_trials": trials, "method": method, "evaluated_trial": trials,
            "learned_best_trial": learned_summary["best_trial"], "spsa_best_trial": spsa_summary["best_trial"],
            "controllers": results, "feedback": feedback, "safety": safety.GENERAL + " " + safety.HARDWARE}
    write_text_atomic(out / "comparison.md", comparison_table(data))
    _plots(setup, rollouts, out)
    write_json_atomic(out / "comparison.json", data)
    return data


def comparison_table(data: dict) -> str:
    """Markdown table of the comparison (one row per controller)."""
    lines = [f"Comparison on `{data['config']}` (seed {data['seed']}, {data['learning_trials']} learning trials, "
             f"method {data['method']}); evaluated on trial {data['evaluated_trial']}.", ""]
    rows = [{"controller": name, **m} for name, m in data["controllers"].items()]
    lines += markdown_table(rows, METRIC_COLUMNS, CONTROLLER)
    if "feedback" in data:
        lines += ["", feedback_line(data["feedback"])]
    return "\n".join(lines) + "\n"


def feedback_line(feedback: dict) -> str:
    """One line saying which gains the feedback ran with and which prior they were placed on."""
    g = feedback["gains"]
    pm = "none" if g["phase_margin_deg"] is None else f"{g['phase_margin_deg']:.0f} deg"
    gm = "inf" if g["gain_margin"] is None else f"{g['gain_margin']:.2g}"
    margins = f"phase margin {pm}, gain margin {gm}" if g["stable_on_prior"] else "unstable on that prior"
    trials = feedback.get("identified_from_trials") or []
    if feedback["prior"] != "identified" or not trials:
        source = f"{feedback['prior']} prior"
    elif len(trials) == 1:
        source = f"prior identified from learned trial {trials[0]}"
    else:
        source = f"prior identified from learned trials {trials[0]}-{trials[-1]}"
    return (f"Feedback gains {g['proportional_bar_per_deg']:.3g} bar/deg, {g['integral_bar_per_deg_s']:.3g} "
            f"bar/(deg s), {g['derivative_bar_s_per_deg']:.3g} bar s/deg on the {source}: "
            f"{margins}, loop delay {g['loop_delay_ms']:.3g} ms"
            + ("" if g["success"] else f"; {g['message']}") + ".")


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
