"""Side-by-side comparison of model-only, feedback and learned control on one plant and seed."""
from __future__ import annotations

from pathlib import Path

import numpy as np

from muscle_sim import safety
from muscle_sim.errors import DataError, SimulationDiverged
from muscle_sim.records import read_log, save_figure_atomic, write_json_atomic, write_text_atomic
from muscle_sim.runs import run_trial
from muscle_sim.report import config_text, write_report
from muscle_sim.tables import CONTROLLER, METRIC_COLUMNS, cells, markdown_table
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
    figures = _plots(setup, rollouts, out, trials)
    write_json_atomic(out / "comparison.json", data)
    _report(setup, data, out, figures)
    return data


def _report(setup, data: dict, out: Path, figures) -> None:
    """report.html of a compare folder."""
    rows = [{"controller": name, **m} for name, m in data["controllers"].items()]
    finite = [r for r in rows if not r.get("fault") and r["rms_error_deg"] is not None
              and np.isfinite(r["rms_error_deg"])]
    best = min(finite, key=lambda r: r["rms_error_deg"])["controller"] if finite else None
    next_step = (f"{best} tracks best here: check its profile on the rig at reduced pressure (the learned profile "
                 f"is learned/final_profile.csv)" if best else "every controller faulted: check the config first")
    cautions = [safety.over_rated(setup.plant.pneumatics.supply_pressure / 1e5, setup.rated_pressure / 1e5)] \
        if setup.over_rated else []
    write_report(out, f"comparison on {data['config']}: seed {data['seed']}, {data['learning_trials']} learning "
                 f"trials", cells(rows, METRIC_COLUMNS, CONTROLLER), config_text(setup.config),
                 cautions + [safety.HARDWARE], next_step, figures, notes=[feedback_line(data["feedback"])])


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


def _plots(setup, rollouts: dict, out: Path, trial: int) -> list:
    """overlay_angle.png and overlay_error.png; returns ``(path, caption)`` pairs for the report."""
    from muscle_sim.plotting import REFERENCE_STYLE, mark_strike, category_colors, new_figure, plot_angle

    names = list(rollouts)
    task, j = setup.task, setup.plant.joint
    what = f"{len(names)} controllers on evaluation trial {trial} (same plant, same noise)"
    fig, axes = new_figure(figsize=(9, 5))
    ax = axes[0, 0]
    plot_angle([rollouts[n] for n in names], ax=ax, labels=names, stops=(j.lower_stop, j.upper_stop),
               strike=(task.strike_time, task.strike_angle), colors=category_colors(len(names)))
    ax.set_title(f"joint angle of {what}", fontsize="medium")
    ax.legend(fontsize="x-small", loc="upper left", bbox_to_anchor=(1.01, 1.0), borderaxespad=0.0)
    angle = save_figure_atomic(fig, out / "overlay_angle.png")
    fig, axes = new_figure(figsize=(9, 5))
    ax = axes[0, 0]
    ax.axhline(0.0, label="reference (zero error)", **REFERENCE_STYLE)
    for n, color in zip(names, category_colors(len(names))):
        r = rollouts[n]
        ax.plot(r.t, np.degrees(r.measured[:, 0] - r.reference), label=n, lw=1, color=color)
    mark_strike(ax, task.strike_time)
    ax.set_xlabel("time [s]")
    ax.set_ylabel("measured − reference angle [deg]")
    ax.set_title(f"tracking error of {what}", fontsize="medium")
    ax.legend(fontsize="x-small", loc="upper left", bbox_to_anchor=(1.01, 1.0), borderaxespad=0.0)
    error = save_figure_atomic(fig, out / "overlay_error.png")
    return [(angle, f"overlay_angle.png: joint angle of {what}, the reference dashed on top, stops and strike marked"),
            (error, f"overlay_error.png: measured minus reference angle of {what}")]
