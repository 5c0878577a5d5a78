"""The ``pamjoint`` command line: sub-commands, argument checks and human/JSON output."""
from __future__ import annotations

import argparse
import dataclasses
import json
import math
import shutil
import sys
from pathlib import Path

import numpy as np

from . import safety, tables
from .errors import ConfigError, DataError, ParameterError
from .threads import single_blas_thread
from .units import UnitError, to_si

EXIT_BAD_INPUT = 2


class _Parser(argparse.ArgumentParser):
    """argparse with one-line errors (exit 2), as every other bad input in pamjoint."""

    def error(self, message):  # noqa: D401 - argparse hook
        self.exit(EXIT_BAD_INPUT, f"{self.prog}: error: {message}\n")


class BadInput(ValueError):
    """A command-line value is invalid (one-line message)."""


def _pressure_list(text: str) -> list[float]:
    """Parse ``"1,2,3 bar"`` or ``"100 kPa, 2 bar"`` into Pa."""
    items = [s.strip() for s in text.split(",") if s.strip()]
    if not items:
        raise BadInput(f"--pressures: {text!r} is empty; write e.g. '1,2,3,4 bar'")
    unit = ""
    last = items[-1].split()
    if len(last) == 2:
        unit = last[1]
    out = []
    for item in items:
        value = item if len(item.split()) == 2 else f"{item} {unit}"
        try:
            pa = to_si(value.strip(), "pressure")
        except UnitError as exc:
            raise BadInput(f"--pressures: {exc}") from None
        if pa < 0:
            raise BadInput(f"--pressures: {item!r} is not allowed; gauge pressures must be >= 0")
        out.append(pa)
    return out


def _print_json(obj) -> int:
    """Print a result as JSON for scripts (NaN as null); exit code 0."""
    from .records import json_safe

    print(json.dumps(json_safe(obj), indent=2))
    return 0


def _trials(args, setup) -> int:
    """``--trials`` or the config's ``learning.trials``, checked."""
    trials = args.trials if args.trials is not None else setup.config.get("learning.trials")
    if trials < 1:
        raise BadInput(f"--trials: {trials} is not allowed; must be >= 1")
    return trials


def _out_dir(args, kind: str) -> Path:
    from .records import new_run_dir

    if args.out:
        out = Path(args.out)
        if out.exists() and not out.is_dir():
            raise BadInput(f"--out: {str(out)!r} is a file; must name a folder")
        if out.is_dir() and any(out.iterdir()):
            if not getattr(args, "overwrite", False):
                raise BadInput(f"--out: {str(out)!r} is not empty; name a new folder, or pass --overwrite to "
                               f"replace an earlier pamjoint run there (tune: --resume continues one)")
            if not (out / "summary.json").is_file():
                raise BadInput(f"--out: {str(out)!r} holds no pamjoint run (no summary.json); --overwrite only "
                               f"replaces a run folder")
            shutil.rmtree(out)
        out.mkdir(parents=True, exist_ok=True)
        return out
    return new_run_dir(kind)


def cmd_joint(args) -> int:
    """Available torque and stiffness of the antagonistic joint over its angle range."""
    from .joint_view import ANGLE, build_view, format_table, swing_extremes, table_columns, table_rows, view_to_dict
    from .muscle_map import format_table as muscle_table
    from .plotting import new_figure, plot_joint_stiffness, plot_joint_torque
    from .records import save_figure_atomic, write_json_atomic
    from .report import config_text, write_report
    from .simulation import Setup

    setup = Setup.from_config(args.config)
    cfg = setup.config
    levels = _pressure_list(args.pressures) if args.pressures else None
    view = build_view(setup, levels)
    out = _out_dir(args, "joint")
    fig, axes = new_figure(2, 1, figsize=(10.5, 7.5), sharex=True)
    plot_joint_torque(view, ax=axes[0, 0])
    plot_joint_stiffness(view, ax=axes[1, 0])
    fig.suptitle(f"{cfg.get('name') or 'joint'}: what the muscle pair can do between the end stops")
    png = save_figure_atomic(fig, out / "joint_view.png")
    rated_bar = setup.rated_pressure / 1e5
    cautions = [safety.over_rated(p / 1e5, rated_bar) for p in view.levels[view.over_rated]]
    data = {"config": cfg.source, "config_hash": cfg.digest, **view_to_dict(view), "cautions": cautions,
            "safety": safety.GENERAL, "plot": str(png)}
    m = setup.plant.muscle
    weak = swing_extremes(view)
    pa, pb = view.hold_pressures
    summary = [
        f"joint of {cfg.source}: pulley radius {setup.plant.joint.pulley_radius * 1e3:g} mm, end stops "
        f"{math.degrees(view.lower_stop):+.0f} .. {math.degrees(view.upper_stop):+.0f} deg, task swing "
        f"{math.degrees(view.swing[0]):+.1f} .. {math.degrees(view.swing[1]):+.1f} deg, rated pressure {rated_bar:g} bar",
        f"over the swing with one muscle at {view.levels[-1] / 1e5:g} bar: at least {weak['toward_plus_nm']:+.2f} N m "
        f"toward +angle (A) and {weak['toward_minus_nm']:+.2f} N m toward -angle (B)",
        f"holding {math.degrees(view.hold_angle):+g} deg: A {pa / 1e5:.2f} bar, B {pb / 1e5:.2f} bar, stiffness "
        f"{view.hold_stiffness:.1f} N m/rad",
        f"one muscle (rest length {m.rest_length * 1e3:g} mm, rest radius {m.rest_radius * 1e3:g} mm, braid "
        f"{math.degrees(m.rest_braid_angle):.1f} deg): force vanishes at {data['muscle']['max_contraction_pct']:.1f} % "
        f"contraction; between the stops A works at {100 * view.contraction_a.min():.1f} .. "
        f"{100 * view.contraction_a.max():.1f} %, B at {100 * view.contraction_b.min():.1f} .. "
        f"{100 * view.contraction_b.max():.1f} %" + (" (below 0: slack)" if min(view.contraction_a.min(),
                                                   view.contraction_b.min()) < 0 else "")]
    joint_table = format_table(view)
    used = np.concatenate([view.contraction_a, view.contraction_b])
    single = muscle_table(view.muscle_map, (max(float(used.min()), 0.0), float(used.max())))
    write_json_atomic(out / "joint_view.json", data)
    write_report(out, f"joint view of {cfg.source}", tables.cells(table_rows(view), table_columns(view), ANGLE),
                 config_text(cfg),
cautions, "size the strike with `pamjoint plan` on this config; the swing band must sit where "
                 "the torque toward each side covers the strike and the return", [png],
                 notes=summary + ["", single])
    if args.json:
        return _print_json(data)
    for line in summary:
        print(line)
    print(joint_table)
    print(single)
    for line in cautions:
        print(line)
    print(f"wrote {png}, {out / 'joint_view.json'} and {out / 'report.html'}")
    print(safety.GENERAL)
    return 0


def _pressure_pair(flag: str, text: str) -> tuple[float, float]:
    values = _pressure_list(text)
    if len(values) != 2:
        raise BadInput(f"{flag}: {text!r} is not allowed; must be two pressures 'A,B unit', e.g. '3,1.5 bar'")
    return values[0], values[1]


def _make_controller(args):
    from controllers.base import PressureProfile
    from controllers.simple import open_loop_controller

    if args.controller == "hold":
        pair = _pressure_pair("--pressures", args.pressures) if args.pressures else None
        return open_loop_controller("hold", pair)
    if args.controller == "step":
        if not args.pressures:
            raise BadInput("--pressures: missing; --controller step needs the pressures after the step, e.g. "
                           "--pressures '4,1 bar'")
        try:
            at = to_si(args.step_at, "time")
        except UnitError as exc:
            raise BadInput(f"--step-at: {exc}") from None
        return open_loop_controller("step", _pressure_pair("--pressures", args.pressures), at)
    if not args.profile:
        raise BadInput("--profile: missing; --controller replay needs a profile CSV "
                       "(columns: time [s], command_a [kPa], command_b [kPa])")
    return open_loop_controller("replay", profile=PressureProfile.read_csv(args.profile), source=args.profile)


def _print_cautions(setup) -> None:
    if setup.over_rated:
        print(safety.over_rated(setup.plant.pneumatics.supply_pressure / 1e5, setup.rated_pressure / 1e5))


def cmd_check(args) -> int:
    """Validate a config and print the resolved SI values."""
    from . import config as cfgmod
    from .simulation import Setup

    cfg = cfgmod.load(args.config)
    setup = Setup.from_config(cfg)
    resolved = {"config": cfg.source, "config_hash": cfg.digest, "values": cfg.values,
                "derived": {"plant_dead_volume_m3": setup.plant.pneumatics.dead_volume,
                            "plant_delay_s": setup.plant.pneumatics.delay,
                            "swing_start_s": setup.task.swing_start, "turn_time_s": setup.task.turn_time,
                            "control_steps": setup.task.n_steps}}
    if args.json:
        return _print_json(resolved)
    print(f"{cfg.source}: valid (hash {cfg.digest}); values in SI units (m, rad, s, Pa gauge, kg):")

    def show(node, prefix=""):
        for key, value in node.items():
            if isinstance(value, dict):
                show(value, f"{prefix}{key}.")
            else:
                print(f"  {prefix}{key} = {tables.value_text(value)}")

    show(cfg.values)
    for key, value in resolved["derived"].items():
        print(f"  derived {key} = {tables.number(value)}")
    _print_cautions(setup)
    return 0


def cmd_run(args) -> int:
    """Run episodes of the configured strike with an open-loop controller."""
    from .runs import run_episodes
    from .simulation import Setup

    if args.episodes < 1:
        raise BadInput(f"--episodes: {args.episodes} is not allowed; must be >= 1")
    setup = Setup.from_config(args.config)
    controller = _make_controller(args)
    controller.reset(setup)      # validates a replayed profile before anything is written
    pressures = getattr(controller, "pressures", None)
    if pressures is not None and max(pressures) > setup.rated_pressure:
        raise BadInput(f"--pressures: {max(pressures) / 1e5:g} bar is not allowed; must be <= the rated pressure "
                       f"{setup.rated_pressure / 1e5:g} bar (plant.muscle.rated_pressure)")
    out = _out_dir(args, "run")
    summary = run_episodes(setup, controller, args.episodes, args.seed, out,
                           progress=None if args.json else sys.stderr)
    if args.json:
        return _print_json(summary)
    print(f"{args.episodes} episode(s) of {setup.config.source} with controller '{controller.name}', seed {args.seed}")
    for line in tables.text_table(summary["episodes"], tables.METRIC_COLUMNS, tables.EPISODE):
        print(line)
    for line in summary["cautions"]:
        print(line)
    print(f"wrote {out}/summary.json, rollouts/, episodes.png and report.html")
    print(safety.GENERAL)
    return 0


def _saved_tune_options(folder) -> dict:
    """The options a tune run folder was started with (``tune_options.json``), config path resolved."""
    path = Path(folder) / "tune_options.json"
    if not path.is_file():
        return {}
    try:
        saved = json.loads(path.read_text(encoding="utf-8"))
        if not isinstance(saved, dict):
            raise ValueError
    except (ValueError, UnicodeDecodeError):
        raise BadInput(f"--resume: {str(path)!r} is not a tune options file") from None
    if saved.get("config"):
        copy = Path(folder) / saved["config"]
        if not copy.exists() and isinstance(saved.get("config_text"), str) and Path(saved["config"]).name == "config.yaml":
            # killed between writing the options and the config copy: the options hold its text
            from .records import write_text_atomic
            write_text_atomic(copy, saved["config_text"])
        saved["config"] = str(copy)
    return saved


def cmd_tune(args) -> int:
    """Learn a feedforward profile trial by trial on the simulated plant."""
    from controllers.base import PressureProfile
    from controllers.tuning import tune
    from . import config as cfgmod
    from .simulation import Setup

    saved = _saved_tune_options(args.resume) if args.resume else {}
    config = args.config or saved.get("config")
    if config is None:
        raise BadInput("config: missing; give the YAML config (or --resume DIR of a run that saved its own)")
    cfg = cfgmod.load(config)
    if saved.get("source"):
        # the folder's copy of the config, recorded under the name the run was started with, so
        # a resumed run writes the same summary and report as one never interrupted
        cfg = dataclasses.replace(cfg, source=str(saved["source"]))
    setup = Setup.from_config(cfg)
    if args.trials is None and "trials" in saved:
        args.trials = saved["trials"]
    trials = _trials(args, setup)
    method = args.method or saved.get("method") or setup.config.get("learning.method")
    args.seed = args.seed if args.seed is not None else saved.get("seed", 0)
    args.start = args.start or saved.get("start")
    start, reference = None, None
    if args.start:
        from controllers.planning import read_plan

        planned = read_plan(args.start, setup.task)       # a plan folder's profile: track its swing
        if planned is not None:
            if abs(planned.home_pressure - setup.task.home_pressure) > 1.0:
                raise BadInput(f"--start: home_pressure {planned.home_pressure / 1e3:g} kPa of the plan is not "
                               f"allowed; the config's is {setup.task.home_pressure / 1e3:g} kPa: plan again")
            start, reference = planned.profile, planned.reference
        else:
            start = PressureProfile.read_csv(args.start)
            start.check_grid(setup.task.dt, setup.task.n_steps, args.start)
    if args.resume:
        out = Path(args.resume)
    else:
        out = _out_dir(args, "tune")
        # the run folder keeps what it was started with, so `tune --resume DIR` alone continues it
        # the options first, holding the config's text too: a kill before that one write leaves
        # nothing to resume, a kill after it a folder that resumes (config.yaml is the copy to read)
        from .records import write_bytes_atomic, write_json_atomic
        text = Path(config).read_bytes()
        write_json_atomic(out / "tune_options.json", {"config": "config.yaml", "source": setup.config.source,
                                                      "method": method, "trials": trials, "seed": args.seed,
                                                      "start": args.start, "config_text": text.decode("utf-8")})
        write_bytes_atomic(out / "config.yaml", text)
    _print_cautions(setup)
    if not args.json:
        print(f"tuning {setup.config.source} with {method} for {trials} trials (seed {args.seed}) into {out}")
        if reference is not None:
            print(f"  from the plan in {Path(args.start).parent if Path(args.start).is_file() else args.start}: "
                  f"learning toward its planned swing")
        print(tables.header_line(tables.METRIC_COLUMNS, tables.TRIAL))

    def progress(row):
        if not args.json:
            print(tables.row_line(row, tables.METRIC_COLUMNS, tables.TRIAL), flush=True)
        return False

    try:
        summary = tune(setup, method, trials, args.seed, out, resume=bool(args.resume), start=start,
                       callback=progress, reference=reference)
    except ValueError as exc:
        raise BadInput(str(exc)) from None
    if args.json:
        return _print_json(summary)
    best = summary["trials"][summary["best_trial"]]
    print(f"{summary['message']}; best trial {summary['best_trial']}: {tables.metric_words(best)}")
    verdict = summary.get("verdict") or {}
    if verdict:
        print(f"verdict: {verdict['message']}; next: {verdict['next_action']}")
    print(f"wrote {out}/summary.json, profiles/, rollouts/, final_profile.csv, learning_curve.png, trajectories.png, "
          "report.html")
    print(safety.GENERAL)
    print(safety.HARDWARE)
    return 0


def cmd_compare(args) -> int:
    """Compare model-only, feedback and learned control on one plant and seed."""
    from controllers.comparison import compare, feedback_line
    from .simulation import Setup

    setup = Setup.from_config(args.config)
    trials = _trials(args, setup)
    out = _out_dir(args, "compare")
    _print_cautions(setup)
    data = compare(setup, trials, args.seed, out, method=args.method or setup.config.get("learning.method"))
    if args.json:
        return _print_json(data)
    print(f"comparison on {setup.config.source}, seed {args.seed}, after {trials} learning trials:")
    rows = [{"controller": name, **m} for name, m in data["controllers"].items()]
    for line in tables.text_table(rows, tables.METRIC_COLUMNS, tables.CONTROLLER):
        print(line)
    print(feedback_line(data["feedback"]))
    print(f"wrote {out}/comparison.json, comparison.md, overlay_angle.png, overlay_error.png")
    print(safety.GENERAL)
    print(safety.HARDWARE)
    return 0


def cmd_learn_step(args) -> int:
    """One learning step from a logged trial: the next profile for the rig."""
    from controllers.base import PressureProfile
    from controllers.rig import learn_step, load_state, logged_pressure_check, state_path_for
    from controllers.tuning import diagnosis_fields
    from .records import read_log, write_json_atomic
    from .simulation import Setup

    setup = Setup.from_config(args.config)
    profile = PressureProfile.read_csv(args.profile)
    log = read_log(args.rollout, setup.task, resample=args.resample, allow_short=True)
    state = load_state(args.state) if args.state else None
    logged = logged_pressure_check(setup, log)
    new_profile, new_state, result = learn_step(setup, log, profile, state, args.method)
    out = Path(args.out)
    new_profile.metadata.update({"from_rollout": str(args.rollout), "method": args.method or
                                 setup.config.get("learning.method")})
    new_profile.write_csv(out)
    state_file = state_path_for(out)
    write_json_atomic(state_file, new_state.to_dict())
    report = {"cost": result.cost, "predicted_cost": result.predicted_cost, "success": result.success,
              "status": result.status, "message": result.message, "accepted": result.accepted,
              "active_limits": result.active_constraints, "diagnosis": diagnosis_fields(result),
              "largest_change_kpa": result.step_norm_kpa, "profile": str(out), "state": str(state_file),
              "peak_command_kpa": float(new_profile.commands.max()) / 1e3,
              **logged, "safety": safety.GENERAL + " " + safety.HARDWARE}
    from .tasks import strike_metrics

    m = strike_metrics(setup.task, log.measured[:, 0], log.measured[:, 1], log.measured[:, 2:4])
    report["logged_trial"] = {k: m[k] for k in ("rms_error_deg", "strike_angle_error_deg", "strike_speed_error_pct")}
    report["log_notes"] = log.metadata.get("read_notes", [])
    if args.json:
        return _print_json(report)
    for note in report["log_notes"]:
        print(f"note: {note}")
    for caution in report["cautions"]:
        print(caution)
    lt = report["logged_trial"]
    print(f"logged trial: {tables.metric_words(lt)}")
    print(f"update: {result.message}; cost {result.cost:.4g} -> predicted {result.predicted_cost:.4g}; "
          f"active limits {result.active_constraints}; largest change {result.step_norm_kpa:.1f} kPa; "
          f"peak command {report['peak_command_kpa']:.0f} kPa")
    d = report["diagnosis"]
    ratio = d["achieved_over_predicted"]
    print(f"limits: {d['boxed_knots']} knots on the pressure limits ({d['boxed_in_strike_window']} shaping the strike), "
          f"{d['angle_limits']} angle-limit samples; last step achieved "
          f"{'-' if ratio is None else f'{ratio:.2f}'} of its predicted error change; prior re-identified: "
          f"{', '.join(d['reidentified']) or 'none'}")
    print(f"wrote {out} and {state_file}")
    print(safety.GENERAL)
    print(safety.HARDWARE)
    return 0


def cmd_calibrate(args) -> int:
    """Fit the muscle model to static bench data."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from .calibration import calibrate, config_snippet, model_force, read_bench_csv
    from .params import McKibbenParams
    from .records import save_figure_atomic, write_json_atomic, write_text_atomic

    if args.config:
        from . import config as cfgmod

        base = cfgmod.muscle_params(cfgmod.load(args.config))
    else:
        if not (args.rest_length and args.rest_radius):
            raise BadInput("--config: missing; give a config, or --rest-length and --rest-radius (e.g. '250 mm')")
        try:
            geometry = dict(rest_length=to_si(args.rest_length, "length"), rest_radius=to_si(args.rest_radius, "length"),
                            rest_braid_angle=to_si(args.braid_angle, "angle"))
            if args.wall_thickness:
                geometry["wall_thickness"] = to_si(args.wall_thickness, "length")
            base = McKibbenParams(**geometry)
        except UnitError as exc:
            raise BadInput(str(exc)) from None
    data = read_bench_csv(args.data, base.rest_length)
    result = calibrate(base, data)
    out = _out_dir(args, "calibrate")
    snippet = config_snippet(result)
    shown = {"end_correction": (1.0, ""), "rest_braid_angle": (180 / math.pi, "deg"), "braid_friction": (1.0, "")}
    report = {"data": str(args.data), "points": int(data.force.size), "success": result.success,
              "message": result.message, "residual_rms_n": result.residual_rms,
              "geometry_assumed": {"rest_length_m": base.rest_length, "rest_radius_m": base.rest_radius,
                                   "wall_thickness_m": base.wall_thickness},
              "parameters": {n: {"value": float(v) * shown[n][0], "std": float(sd) * shown[n][0], "unit": shown[n][1]}
                             for n, v, sd in zip(result.names, result.values, result.std)},
              "snippet": snippet}
    fig, ax = plt.subplots(figsize=(7, 4.5), layout="constrained")
    for pressure in np.unique(data.pressure):
        sel = data.pressure == pressure
        pts = ax.plot(100 * data.contraction[sel], data.force[sel], ".", ms=4)[0]
        for d, style in ((1.0, "-"), (-1.0, "--"), (0.0, ":")):
            sub = sel & (data.direction == d)
            if sub.any():
                eps = np.linspace(data.contraction[sub].min(), data.contraction[sub].max(), 60)
                from .calibration import BenchData

                grid = BenchData(np.full(60, pressure), eps, np.zeros(60), np.full(60, d))
                fric = result.params.braid_friction if "braid_friction" in result.names else 0.0
                ax.plot(100 * eps, model_force(result.params, grid, result.params.end_correction,
                                               result.params.rest_braid_angle, fric), style, color=pts.get_color(), lw=1)
        pts.set_label(f"{pressure / 1e5:g} bar")
    ax.set_xlabel("contraction [%]")
    ax.set_ylabel("force [N]")
    ax.set_title("bench data (dots), fitted model (solid: shortening, dashed: lengthening)", fontsize="small")
    ax.legend(fontsize="small")
    save_figure_atomic(fig, out / "calibration_fit.png")
    plt.close(fig)
    write_text_atomic(out / "fitted_muscle.yaml", snippet)
    write_json_atomic(out / "calibration.json", report)
    if args.json:
        return _print_json(report) or (0 if result.success else 1)
    print(f"fitted {data.force.size} bench points of {args.data}: {result.message}")
    for n, prm in report["parameters"].items():
        print(f"  {n:18s} {prm['value']:.5g} +- {prm['std']:.2g} {prm['unit']}")
    print(f"  residual rms {result.residual_rms:.3g} N")
    print(snippet, end="")
    print(f"geometry assumed: rest length {base.rest_length * 1e3:g} mm, rest radius {base.rest_radius * 1e3:g} mm, "
          f"wall {base.wall_thickness * 1e3:g} mm")
    print(f"wrote {out}/calibration.json, fitted_muscle.yaml, calibration_fit.png")
    if not result.success:
        print(f"pamjoint calibrate: error: the fit failed: {result.message}", file=sys.stderr)
        return 1
    return 0


def cmd_preflight(args) -> int:
    """Check a profile before it goes to hardware; optionally write a reduced-pressure copy."""
    from controllers.base import PressureProfile
    from controllers.preflight import preflight, reduced
    from .simulation import Setup

    setup = Setup.from_config(args.config)
    profile = PressureProfile.read_csv(args.profile)
    try:
        max_rate = to_si(args.max_rate, "pressure_rate") if args.max_rate else None
        margin = to_si(args.margin, "angle") if args.margin else None
    except UnitError as exc:
        raise BadInput(f"--max-rate/--margin: {exc}") from None
    if args.reduce_to is not None:
        if args.write is None:
            raise BadInput("--write: missing; --reduce-to writes the reduced profile there, e.g. --write first.csv")
        try:
            profile = reduced(profile, args.reduce_to)
        except ValueError as exc:
            raise BadInput(str(exc)) from None
    try:
        report = preflight(setup, profile, max_rate, margin)
    except ValueError as exc:
        raise BadInput(str(exc)) from None
    if args.reduce_to is not None:
        profile.write_csv(args.write)
        report["written"] = str(args.write)
    if args.json:
        return _print_json(report) or (0 if report["passed"] else 1)
    p = report["predicted"]
    print(f"profile {args.profile}{f' reduced to {args.reduce_to:g} of its pressures' if args.reduce_to else ''}: "
          f"peak command {report['peak_command_kpa']:.0f} kPa (rated {report['rated_pressure_bar']:g} bar), "
          f"peak rate {report['peak_rate_bar_per_s']:.3g} bar/s")
    print(f"on the prior: stop margin {tables.cell(p['stop_margin_deg'], '.2f')} deg, {tables.metric_words(p)}, "
          f"fault {p['fault'] or tables.MISSING}")
    for line in report["findings"]:
        print(f"FINDING: {line}")
    print("preflight passed" if report["passed"] else "preflight FAILED: do not run this profile on hardware as is")
    if report.get("written"):
        print(f"wrote {report['written']}")
    print(safety.GENERAL)
    print(safety.HARDWARE)
    return 0 if report["passed"] else 1


def _identification_table(result) -> list[str]:
    """The parameter table of ``pamjoint identify`` in display units; '*' marks parameters the data
    do not excite (they keep the prior's value)."""
    from controllers.identification import DISPLAY_UNITS

    lines = [f"{'parameter':<24} {'prior':>10} {'fitted':>10} {'+- 1 sigma':>11}  unit"]
    for name, p in result.parameters.items():
        unit, scale = DISPLAY_UNITS[name]
        fitted = f"{p.value / scale:>10.4g}" if p.excited else f"{'-':>10}"
        sd = f"{p.std / scale:>11.2g}" if p.excited and np.isfinite(p.std) else f"{'-':>11}"
        mark = f"  * {p.note}" if not p.excited else (f"  ({p.note})" if p.note else "")
        lines.append(f"{name:<24} {p.prior / scale:>10.4g} {fitted} {sd}  {unit:<9}{mark}".rstrip())
    return lines


def _plot_identification(result, logs, task, path) -> Path:
    """Measured angle against the prior's prediction before and after the fit, one panel per trial."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from .records import save_figure_atomic

    shown = list(zip(logs, result.predictions))[:4]
    fig, axes = plt.subplots(len(shown), 1, figsize=(8, 2.6 * len(shown) + 0.6), sharex=True, squeeze=False,
                             layout="constrained")
    for ax, (log, (before, after)) in zip(axes[:, 0], shown):
        ax.plot(log.t, np.degrees(log.measured[:, 0]), color="k", lw=1.5, label="measured")
        ax.plot(log.t[:before.shape[0]], np.degrees(before[:, 0]), "--", label="prior before")
        ax.plot(log.t[:after.shape[0]], np.degrees(after[:, 0]), label="prior after")
        ax.set_ylabel("angle [deg]")
    axes[0, 0].legend(fontsize="small")
    axes[-1, 0].set_xlabel("time [s]")
    fig.suptitle("prior model against the logged trials (same commands)", fontsize="small")
    saved = save_figure_atomic(fig, path)
    plt.close(fig)
    return saved


def cmd_identify(args) -> int:
    """Fit the prior's payload, friction, pressure response and force scale to logged trials."""
    from controllers.identification import PARAMETERS, config_snippet, update_prior
    from .records import read_log, write_json_atomic, write_text_atomic
    from .simulation import Setup

    setup = Setup.from_config(args.config)
    names = None
    if args.fit:
        names = [n.strip() for n in args.fit.split(",") if n.strip()]
        for n in names or [args.fit]:
            if n not in PARAMETERS:
                raise BadInput(f"--fit: {n!r} is not allowed; must be a comma-separated list of "
                               f"{', '.join(PARAMETERS)}")
    logs = [read_log(path, setup.task, resample=args.resample, allow_short=True) for path in args.rollout]
    out = _out_dir(args, "identify")
    _, result = update_prior(setup, logs, parameters=names)
    snippet = config_snippet(result)
    png = _plot_identification(result, logs, setup.task, out / "identification.png") if result.predictions else None
    write_text_atomic(out / "prior_fit.yaml", snippet + "# " + safety.GENERAL + "\n")
    report = {"config": setup.config.source, "config_hash": setup.config.digest,
              "rollouts": [str(p) for p in args.rollout], **result.to_dict(), "snippet": snippet,
              "plot": str(png) if png else None, "safety": safety.GENERAL + " " + safety.HARDWARE}
    write_json_atomic(out / "identification.json", report)
    if args.json:
        return _print_json(report)
    steps = sum(len(log.t) - 1 for log in logs)
    print(f"identified the prior of {setup.config.source} from {len(logs)} trial(s), {steps} control steps: "
          f"{result.message}")
    for line in _identification_table(result):
        print("  " + line)
    (a0, a1), (p0, p1) = result.angle_rms, result.pressure_rms
    pressure = f", pressure {p0 / 1e3:.3g} -> {p1 / 1e3:.3g} kPa" if np.isfinite(p0) else ""
    print(f"  prediction error (rms) before -> after: angle {math.degrees(a0):.3g} -> {math.degrees(a1):.3g} deg"
          f"{pressure}; residual {result.residual_rms_before:.4g} -> {result.residual_rms:.4g} noise sigmas")
    if any(not p.excited for p in result.parameters.values()):
        print("  * not excited by these trials: kept at the prior's value")
    print(snippet, end="")
    print(f"wrote {out}/identification.json, prior_fit.yaml" + (", identification.png" if png else ""))
    print(safety.GENERAL)
    print(safety.HARDWARE)
    return 0


def _plan_figure(setup, result, t):
    """plan.png: the planned swing against the task reference with stops, angle limits and the
    strike; the planned commands of both muscles below, on the same time axis."""
    from .plotting import (COLOR_A, COLOR_B, mark_stops, mark_strike, new_figure, REFERENCE_STYLE)
    from .tasks import reference

    task, j = setup.task, setup.plant.joint
    fig, axes = new_figure(2, 1, figsize=(8, 6.5), sharex=True)
    ax1, ax2 = axes[:, 0]
    ax1.plot(t, np.degrees(reference(task, t)[0]), label="task reference", **REFERENCE_STYLE)
    ax1.plot(t, np.degrees(result.swing), color="#4c5bd4", lw=1.6, label="planned swing (prior model)")
    ax1.plot([task.strike_time], [math.degrees(task.strike_angle)], marker="o", mfc="none", mec="k", ms=8, ls="none",
             zorder=11, label="strike target")
    margin = setup.config.get("learning.angle_margin")
    for q in (j.lower_stop + margin, j.upper_stop - margin):
        ax1.axhline(math.degrees(q), color="0.45", lw=0.8, ls="--",
                    label="angle limit (stop less margin)" if q < 0 else None)
    mark_stops(ax1, j.lower_stop, j.upper_stop)
    mark_strike(ax1, task.strike_time)
    ax1.set_ylabel("joint angle [deg]")
    ax1.set_title("planned swing", fontsize="small", loc="left")
    ax1.legend(fontsize="x-small", loc="upper left", bbox_to_anchor=(1.01, 1.0), borderaxespad=0.0)
    p = result.profile
    ax2.step(p.t, p.commands[:, 0] / 1e5, where="post", color=COLOR_A, label="command A (pulls toward +angle)")
    ax2.step(p.t, p.commands[:, 1] / 1e5, where="post", color=COLOR_B, label="command B (pulls toward −angle)")
    ax2.axhline(setup.rated_pressure / 1e5, color="0.2", lw=1, ls="-.", label=f"rated {setup.rated_pressure / 1e5:g} bar")
    mark_strike(ax2, task.strike_time, label=False)
    ax2.set_ylabel("command [bar gauge]")
    ax2.set_xlabel("time [s]")
    ax2.set_title("planned pressure commands", fontsize="small", loc="left")
    ax2.legend(fontsize="x-small", loc="upper left", bbox_to_anchor=(1.01, 1.0), borderaxespad=0.0)
    fig.suptitle(f"{setup.config.get('name') or 'plan'}: strike planned on the prior model ({result.objective})",
                 fontsize="medium")
    return fig


def _plan_report(setup, result, out: Path, png) -> None:
    from .report import config_text, write_report

    task = setup.task
    rows = [["quantity", "planned", "wanted"],
            ["strike angle [deg]", f"{math.degrees(result.strike_angle):+.3f}", f"{math.degrees(task.strike_angle):+.3f}"],
            ["strike speed [rad/s]", f"{result.strike_speed:.3f}", f"{task.strike_speed:.3f}"],
            [f"{result.objective} [bar]", f"{result.objective_value:.3f}", tables.MISSING]]
    rows += [["active limit", line, tables.MISSING] for line in result.active_limits]
    next_step = (f"tune from this profile: `pamjoint tune {setup.config.source} --start {out / 'profile.csv'}`"
                 if result.success else "the strike is out of reach: " + "; ".join(result.suggestions or ["relax the task"]))
    cautions = [safety.HARDWARE]
    if setup.over_rated:
        cautions.insert(0, safety.over_rated(setup.plant.pneumatics.supply_pressure / 1e5, setup.rated_pressure / 1e5))
    write_report(out, f"plan of {setup.config.source} on the prior model", rows, config_text(setup.config), cautions,
                 next_step, [(png, "plan.png: planned swing against the task reference with stops, angle limits and "
                                   "strike; the planned commands of both muscles below")], notes=[result.message])


def cmd_plan(args) -> int:
    """Plan the strike offline on the prior model."""
    from controllers.planning import plan, plan_task
    from .records import save_figure_atomic, write_json_atomic, write_text_atomic
    from .simulation import Setup

    setup = Setup.from_config(args.config)
    rate = None
    if args.max_pressure_rate:
        try:
            rate = to_si(args.max_pressure_rate, "pressure_rate")
        except UnitError as exc:
            raise BadInput(f"--max-pressure-rate: {exc}") from None
        if rate <= 0:
            raise BadInput(f"--max-pressure-rate: {args.max_pressure_rate!r} is not allowed; must be > 0")
    if args.iterations < 1:
        raise BadInput(f"--iterations: {args.iterations} is not allowed; must be >= 1")
    out = _out_dir(args, "plan")
    result = plan(setup, args.minimise, rate, args.iterations)
    task = setup.task
    t = np.arange(task.n_steps + 1) * task.dt
    result.profile.write_csv(out / "profile.csv")
    lines = ["# planned swing of the prior model", "time [s],reference [deg]"]
    lines += [f"{a:.9g},{math.degrees(q):.9g}" for a, q in zip(t, result.swing)]
    write_text_atomic(out / "reference.csv", "\n".join(lines) + "\n")
    png = save_figure_atomic(_plan_figure(setup, result, t), out / "plan.png")
    # "success" means converged (optimality test passed, not stopped at the iteration limit)
    report = {"success": result.success, "converged": result.converged, "status": result.status,
              "message": result.message, "optimiser_message": result.optimiser_message,
              "optimality": result.optimality if math.isfinite(result.optimality) else None,
              "iterations": result.iterations, "iteration_limit": result.max_iterations,
              "misses": result.misses, "objective": result.objective, "objective_value": result.objective_value,
              "strike_angle_deg": math.degrees(result.strike_angle), "strike_speed_rad_s": result.strike_speed,
              "active_limits": result.active_limits, "max_strike_speed_rad_s": result.max_strike_speed,
              "binding_limit": result.binding_limit, "suggestions": result.suggestions,
              "profile": str(out / "profile.csv"), "reference": str(out / "reference.csv"),
              "home_pressure_kpa": result.home_pressure / 1e3,
              "home_pressures_kpa": [p / 1e3 for p in result.home_pressures], "task": plan_task(task),
              "safety": safety.GENERAL + " " + safety.HARDWARE}
    write_json_atomic(out / "plan.json", report)
    _plan_report(setup, result, out, png)
    if args.json:
        return _print_json(report)
    print(f"plan of {setup.config.source} on the prior model, minimising {result.objective}: {result.message}")
    print(f"  strike {math.degrees(result.strike_angle):.3f} deg at {task.strike_time * 1e3:g} ms with "
          f"{result.strike_speed:.3f} rad/s (wanted {math.degrees(task.strike_angle):g} deg, {task.strike_speed:g} rad/s)")
    print(f"  converged: {'yes' if result.converged else 'no'} ({result.optimiser_message}; "
          f"{result.iterations} of {result.max_iterations} iterations)")
    print(f"  {result.objective}: {result.objective_value:.4g} bar")
    for line in result.active_limits or ["none"]:
        print(f"  active limit: {line}")
    for line in result.suggestions:
        print(f"  would help: {line}")
    print(f"wrote {out}/profile.csv, reference.csv, plan.json, plan.png, report.html (start tuning with --start "
          f"{out}/profile.csv)")
    print(safety.HARDWARE)
    return 0


def _package_version() -> str:
    """The installed distribution's version (the source tree's when run uninstalled)."""
    from importlib.metadata import PackageNotFoundError, version

    from . import __version__
    try:
        return version("pamjoint")
    except PackageNotFoundError:
        return __version__


def _add_out(p) -> None:
    p.add_argument("--out", help="output folder, new or empty (default: a new folder under runs/)")
    p.add_argument("--overwrite", action="store_true", help="replace an earlier pamjoint run in --out")


def cmd_sweep(args) -> int:
    """Run tune, compare or run over sampled plant variations, on local processes or a Dask cluster."""
    from .sweep import SweepError, load_spec, run_sweep, summary_lines

    spec = load_spec(args.spec)
    if args.resume and not args.out:
        raise BadInput("--resume: needs --out DIR, the folder of the sweep to continue")
    out = Path(args.out) if args.resume else _out_dir(args, "sweep")
    where = f"the Dask scheduler at {args.scheduler}" if args.scheduler else (
        "this process" if args.workers == 0 else f"{args.workers or 'all'} local worker process(es)")
    if not args.json:
        print(f"sweep {spec['source']}: {spec['samples']} samples of {spec['job']['kind']} on {where} into {out}",
              flush=True)
    try:
        result = run_sweep(spec, out, workers=args.workers, scheduler=args.scheduler, resume=args.resume,
                           progress=None if args.json else sys.stderr)
    except SweepError as exc:
        raise BadInput(str(exc)) from None
    if args.json:
        return _print_json(result.data)
    for line in summary_lines(result.data):
        print(line)
    print(f"wrote {out}/sweep.json, samples.csv, success_by_key.png, rms_ratio.png, trials_to_strike.png, samples/")
    print(safety.GENERAL)
    print(safety.HARDWARE)
    return 0


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of all sub-commands."""
    parser = _Parser(prog="pamjoint", description="Antagonistic McKibben muscle joints: sizing, "
                     "simulation and learned feedforward control.")
    parser.add_argument("--version", action="version", version=f"pamjoint {_package_version()}")
    sub = parser.add_subparsers(dest="command", required=True, parser_class=_Parser)

    p = sub.add_parser("joint", help="available torque and stiffness of the muscle pair over the joint angle")
    p.add_argument("config", help="YAML config (the plant's muscles and joint, and the task)")
    p.add_argument("--pressures", help="pressure levels, e.g. '2,4,6 bar': one muscle at the level for torque, "
                   "both for stiffness (default: a third, two thirds and all of the rated pressure)")
    _add_out(p)
    p.add_argument("--json", action="store_true", help="print the numbers as JSON")
    p.set_defaults(func=cmd_joint)

    p = sub.add_parser("check", help="validate a config and print the resolved SI values")
    p.add_argument("config", help="YAML config")
    p.add_argument("--json", action="store_true", help="print the resolved values as JSON")
    p.set_defaults(func=cmd_check)

    p = sub.add_parser("run", help="simulate strike episodes with an open-loop controller")
    p.add_argument("config", help="YAML config")
    p.add_argument("--episodes", type=int, default=1, help="number of episodes (trials), default 1")
    p.add_argument("--controller", choices=("hold", "step", "replay"), default="hold",
                   help="hold: constant pressures (default: those holding home); step: home pressures, then "
                   "--pressures from --step-at; replay: a pressure profile CSV (--profile)")
    p.add_argument("--pressures", help="two gauge pressures 'A,B unit', e.g. '4,1 bar'")
    p.add_argument("--step-at", default="100 ms", help="when the step controller switches (default 100 ms)")
    p.add_argument("--profile", help="profile CSV for --controller replay")
    p.add_argument("--seed", type=int, default=0, help="random seed (sensor noise, drift), default 0")
    _add_out(p)
    p.add_argument("--json", action="store_true", help="print the summary as JSON")
    p.set_defaults(func=cmd_run)

    p = sub.add_parser("preflight", help="check a profile before it goes to hardware: pressure limits, rate, "
                                          "predicted stop margin on the prior")
    p.add_argument("profile", help="profile CSV (time, command_a, command_b)")
    p.add_argument("--config", required=True, help="YAML config of the rig")
    p.add_argument("--max-rate", help="bound on the command rate, e.g. '150 bar/s' (default: report only)")
    p.add_argument("--margin", help="least predicted distance to an end stop (default: learning.angle_margin)")
    p.add_argument("--reduce-to", type=float, metavar="SHARE",
                   help="scale every command by SHARE (0 < SHARE <= 1) for a first run at reduced pressure")
    p.add_argument("--write", help="where to write the reduced profile CSV (with --reduce-to)")
    p.add_argument("--json", action="store_true", help="print the findings as JSON")
    p.set_defaults(func=cmd_preflight)

    p = sub.add_parser("tune", help="learn the feedforward profile of a strike trial by trial")
    p.add_argument("config", nargs="?", help="YAML config (with --resume DIR: default the run's own copy)")
    p.add_argument("--trials", type=int, help="number of trials (default: learning.trials)")
    p.add_argument("--method", choices=("norm-optimal", "gradient", "spsa"),
                   help="update rule (default: learning.method)")
    p.add_argument("--start", help="profile CSV to start from (default: model-only feedforward)")
    p.add_argument("--seed", type=int, help="random seed, default 0 (with --resume: the run's)")
    _add_out(p)
    p.add_argument("--resume", metavar="DIR", help="continue an interrupted tune run in DIR (config, trials, "
                                                    "method and seed default to the run's)")
    p.add_argument("--json", action="store_true", help="print the summary as JSON")
    p.set_defaults(func=cmd_tune)

    p = sub.add_parser("compare", help="compare learned against model-only and feedback control")
    p.add_argument("config", help="YAML config")
    p.add_argument("--trials", type=int, help="learning trials (default: learning.trials)")
    p.add_argument("--method", choices=("norm-optimal", "gradient"), help="learner (default: learning.method)")
    p.add_argument("--seed", type=int, default=0, help="random seed, default 0")
    _add_out(p)
    p.add_argument("--json", action="store_true", help="print the comparison as JSON")
    p.set_defaults(func=cmd_compare)

    p = sub.add_parser("learn-step", help="next profile from a trial logged on the rig (same learner as tune)")
    p.add_argument("--rollout", required=True, help="trial log CSV (time, angle, [rate], [pressures], commands)")
    p.add_argument("--profile", required=True, help="the profile CSV the trial ran")
    p.add_argument("--config", required=True, help="YAML config of the rig")
    p.add_argument("--out", required=True, help="where to write the next profile CSV (state saved beside)")
    p.add_argument("--state", help="learner state saved beside the profile (default: start fresh)")
    p.add_argument("--method", choices=("norm-optimal", "gradient"), help="update rule (default: learning.method)")
    p.add_argument("--resample", action="store_true", help="resample an irregular log onto the control grid")
    p.add_argument("--json", action="store_true", help="print the report as JSON")
    p.set_defaults(func=cmd_learn_step)

    p = sub.add_parser("calibrate", help="fit the muscle model to static bench data")
    p.add_argument("data", help="bench CSV: pressure [bar], length [mm] or contraction [%%], force [N], "
                   "optional direction [-] (+1 shortening, -1 lengthening)")
    p.add_argument("--config", help="config whose plant.muscle gives the rest geometry and the first guess")
    p.add_argument("--rest-length", help="rest length, e.g. '250 mm' (without --config)")
    p.add_argument("--rest-radius", help="rest braid radius, e.g. '8 mm' (without --config)")
    p.add_argument("--braid-angle", default="20 deg", help="first guess of the rest braid angle (without --config)")
    p.add_argument("--wall-thickness", help="bladder wall thickness, e.g. '1 mm' (without --config; default: "
                                            "the muscle model's)")
    _add_out(p)
    p.add_argument("--json", action="store_true", help="print the report as JSON")
    p.set_defaults(func=cmd_calibrate)

    p = sub.add_parser("identify", help="fit the prior's payload, friction, pressure response and force scale "
                       "to logged trials")
    p.add_argument("--config", required=True, help="YAML config whose prior is fitted")
    p.add_argument("--rollout", required=True, action="append",
                   help="trial log CSV (as learn-step reads it); repeat for several trials")
    p.add_argument("--fit", help="comma-separated parameters to fit (default all: pressure_delay, "
                   "pressure_time_constant, payload_mass, viscous_damping, coulomb_torque, payload_radius, "
                   "force_scale)")
    p.add_argument("--resample", action="store_true", help="resample irregular logs onto the control grid")
    _add_out(p)
    p.add_argument("--json", action="store_true", help="print the report as JSON")
    p.set_defaults(func=cmd_identify)

    p = sub.add_parser("plan", help="plan the strike offline on the prior model under limits")
    p.add_argument("config", help="YAML config")
    p.add_argument("--minimise", choices=("peak-pressure", "mean-pressure"), default="peak-pressure",
                   help="cost to minimise (default peak-pressure)")
    p.add_argument("--max-pressure-rate", help="limit of the command rate, e.g. '100 bar/s' (default none)")
    p.add_argument("--iterations", type=int, default=150, help="optimiser iterations (default 150)")
    _add_out(p)
    p.add_argument("--json", action="store_true", help="print the report as JSON")
    p.set_defaults(func=cmd_plan)

    p = sub.add_parser("sweep", help="run tune, compare or run over sampled plant variations (local processes "
                       "or a Dask cluster)")
    p.add_argument("spec", help="sweep spec YAML: base config, keys to vary, samples, job, seed")
    p.add_argument("--out", help="sweep folder, new or empty (default: a new folder under runs/)")
    p.add_argument("--overwrite", action="store_true", help="replace an earlier sweep in --out")
    p.add_argument("--workers", type=int, help="local worker processes (default: the machine's cores; 0: in this "
                   "process)")
    p.add_argument("--scheduler", metavar="ADDRESS", help="run on the dask.distributed scheduler at ADDRESS, e.g. "
                   "tcp://10.0.0.5:8786 (needs the cluster extra)")
    p.add_argument("--resume", action="store_true", help="continue the sweep in --out, skipping finished samples")
    p.add_argument("--json", action="store_true", help="print sweep.json")
    p.set_defaults(func=cmd_sweep)
    return parser


@single_blas_thread
def main(argv=None) -> int:
    """Entry point of the ``pamjoint`` console script; returns the exit code. BLAS runs on one
    thread (:mod:`muscle_sim.threads`), so every output is the same whatever the thread settings."""
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return args.func(args)
    except (ConfigError, DataError, ParameterError, UnitError, BadInput) as exc:
        print(f"pamjoint {args.command}: error: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except BrokenPipeError:          # output piped into e.g. `head`: not an error of ours
        sys.stderr.close()
        return 0
    except OSError as exc:           # read-only folder, full disk, missing file: one line, no traceback
        where = f" {exc.filename!r}" if exc.filename else ""
        print(f"pamjoint {args.command}: error: cannot use{where}: {exc.strerror or exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        print(f"pamjoint {args.command}: interrupted; finished files are complete, none is half-written",
              file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
