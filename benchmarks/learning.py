"""Learning benchmark over the mismatch suite: the named scenarios of configs/scenarios/, seeded
random draws over the same ranges (muscle_sim.scenarios.draw_scenario), and on the demo flipper
the trials SPSA needs for the precision the learner reaches. Writes benchmarks/results/learning.json.

Per case: ``tune(setup, "norm-optimal", 13, 1, ...)`` (21 trials where the plant drifts), the
model-only feedforward trial, and a noise floor: the final (best) profile of the run replayed on
fresh sensor noise (NOISE_REPEATS seeds at trial index 10, so a drifting plant is as in trial 10,
with fresh drift spread too); the floor is the spread (max - min) of those RMS errors, its std is
reported beside it. Trial i is the i-th measured trial counted from 0 (trial 0 runs the
model-only profile), so "RMS after 10 trials" is trial 10's, the profile learned from ten.

A case passes when all of these hold (issue goals):
- RMS after 10 trials <= max(model-only RMS / 20, 2 x noise floor);
- the strike is within 0.2 deg and 1 % of its speed by trial 12;
- no trial after trial 3 ends in an end-stop slam or divergence (fault);
- where the plant drifts: every RMS of trials 10 .. 20 within 2x of the best RMS so far, that best
  taken no lower than the best of the noise-floor replays (a minimum over noisy trials, like the
  best so far; the strict ratio to the best trial is reported beside it).
Goal for the random draws: >= 90 % pass.

Reach reference: the same run with the prior matched to the plant as far as the prior's models go
(muscle_sim.scenarios.with_matched_prior). A strike met by trial 12 in either run is shown to be
within reach of the plant; one that neither meets may lie at or beyond what the muscles give
within the pressure limits (or both runs fall short). The summary gives the pass fraction over all
draws and over those shown within reach.

Usage: ``python benchmarks/learning.py [--draws N] [--jobs J] [--no-spsa] [--no-reach]``; cases run in J
processes (concurrent.futures), each with BLAS pinned to one thread (threadpoolctl).

Studying a change of the learner: ``--set KEY=VALUE`` (repeatable) puts a config value into every
case after it is drawn (``--set learning.regularisation=0.02``), ``--only NAME,...`` runs some cases
(``demo``, ``scenario/finger``, ``draw/40``), ``--compare OLD.json`` lists the cases whose verdict
changed against an earlier run and the median ratio of their RMS after 10 trials (new / old), so a
change is judged on the whole suite, not on the case that suggested it.
"""
from __future__ import annotations

import argparse
import concurrent.futures
import copy
import json
import multiprocessing
import platform
import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import yaml

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from controllers.base import PressureProfile  # noqa: E402
from controllers.feedforward import FeedforwardController, model_only_profile  # noqa: E402
from controllers.tuning import trial_rng, tune  # noqa: E402
from muscle_sim.records import write_json_atomic  # noqa: E402
from muscle_sim.runs import run_trial  # noqa: E402
from muscle_sim.scenarios import draw_scenario, with_matched_prior  # noqa: E402
from muscle_sim.simulation import Setup  # noqa: E402
from muscle_sim.sweep import set_value  # noqa: E402

ANGLE_GOAL, SPEED_GOAL = 0.2, 1.0          # strike within 0.2 deg and 1 % of its speed
RMS_RATIO_GOAL = 20.0                      # model-only RMS / RMS after 10 trials
FLOOR_FACTOR = 2.0                         # ... or RMS after 10 trials within 2x the noise floor
TRIALS, DRIFT_TRIALS = 13, 21
RMS_TRIAL, STRIKE_BY, FAULTS_AFTER = 10, 12, 3
DRIFT_WINDOW, DRIFT_FACTOR = (10, 20), 2.0
SEED = 1                                   # tune seed: noise of trial i from (SEED, i)
NOISE_REPEATS, NOISE_SEED0 = 5, 1000       # noise-floor replays: seeds 1000 .. 1004
DRAW_GOAL = 0.9
SPSA_BUDGET = 300


def first_on_strike(rows):
    """Index of the first trial with the strike within the goal, else None."""
    for r in rows:
        a, s = r["strike_angle_error_deg"], r["strike_speed_error_pct"]
        if a is not None and s is not None and np.isfinite(a) and np.isfinite(s) \
                and abs(a) <= ANGLE_GOAL and abs(s) <= SPEED_GOAL:
            return r["trial"]
    return None


def _drift_check(rms, replay_best=0.0):
    """Whether every RMS in the drift window stays within DRIFT_FACTOR of the best so far, and the
    worst such ratio. The best so far is a minimum over noisy trials, so it is taken no lower than
    the best RMS of the final profile replayed on fresh noise (``replay_best``): a lucky trial
    does not set a level the plant's trial-to-trial variation lets no profile keep."""
    lo, hi = DRIFT_WINDOW
    ratios = [rms[k] / max(min(rms[: k + 1]), replay_best) for k in range(lo, min(hi, len(rms) - 1) + 1)]
    worst = max(ratios) if ratios else None
    return (worst is not None and worst <= DRIFT_FACTOR and len(rms) > hi), worst


def _reach(raw: dict, trials: int) -> dict:
    """The reach reference: the tune run with the prior matched to the plant."""
    setup = Setup.from_config(with_matched_prior(raw))
    with tempfile.TemporaryDirectory() as tmp:
        rows = tune(setup, "norm-optimal", trials, SEED, Path(tmp) / "tune")["trials"]
    first = first_on_strike(rows)
    return {"first_trial_on_strike": first, "reached_by_trial_12": first is not None and first <= STRIKE_BY,
            "rms_after_10_trials_deg": rows[RMS_TRIAL]["rms_error_deg"] if len(rows) > RMS_TRIAL else None,
            "last_strike_angle_error_deg": rows[-1]["strike_angle_error_deg"],
            "last_strike_speed_error_pct": rows[-1]["strike_speed_error_pct"],
            "last_peak_pressure_kpa": rows[-1]["peak_pressure_kpa"]}


def run_case(name: str, raw: dict, spsa: bool = False, reach: bool = True) -> dict:
    """One case: tune, model-only trial, noise floor, the pass criteria and (``reach``) the
    matched-prior reference (a picklable job)."""
    setup = Setup.from_config(raw)
    drifting = setup.drift.active
    trials = DRIFT_TRIALS if drifting else TRIALS
    t0 = time.perf_counter()
    _, base = run_trial(setup, FeedforwardController(model_only_profile(setup)), 0, trial_rng(SEED, 0), SEED)
    with tempfile.TemporaryDirectory() as tmp:
        t_start = time.perf_counter()
        summary = tune(setup, "norm-optimal", trials, SEED, Path(tmp) / "tune")
        t_tune = time.perf_counter() - t_start
        final = PressureProfile.read_csv(Path(tmp) / "tune" / "final_profile.csv")
        spsa_summary = tune(setup, "spsa", SPSA_BUDGET, SEED, Path(tmp) / "spsa") if spsa else None
    replays = [run_trial(setup, FeedforwardController(final, name="final"), RMS_TRIAL,
                         trial_rng(NOISE_SEED0 + j, RMS_TRIAL), NOISE_SEED0 + j)[1] for j in range(NOISE_REPEATS)]
    replay_rms = [m["rms_error_deg"] for m in replays]
    floor = max(replay_rms) - min(replay_rms)
    rows = summary["trials"]
    rms = [r["rms_error_deg"] for r in rows]
    rms10 = rms[RMS_TRIAL] if len(rms) > RMS_TRIAL else None
    goal = max(base["rms_error_deg"] / RMS_RATIO_GOAL, FLOOR_FACTOR * floor)
    first = first_on_strike(rows)
    late_faults = [r["trial"] for r in rows if r["trial"] > FAULTS_AFTER and r["fault"]]
    checks = {"rms_goal_met": rms10 is not None and rms10 <= goal,
              "strike_by_trial_12": first is not None and first <= STRIKE_BY,
              "no_faults_after_trial_3": not late_faults}
    out = {
        "name": name,
        "description": setup.config.get("description").strip(),
        "drift": drifting,
        "trials": len(rows),
        "model_only": {k: base[k] for k in ("rms_error_deg", "strike_angle_error_deg", "strike_speed_error_pct",
                                            "peak_pressure_kpa", "fault")},
        "rms_after_10_trials_deg": rms10,
        "rms_ratio_model_only_over_after_10": (base["rms_error_deg"] / rms10) if rms10 else None,
        "noise_floor": {"replays": NOISE_REPEATS, "rms_deg": replay_rms, "mean_rms_deg": statistics.fmean(replay_rms),
                        "std_deg": statistics.stdev(replay_rms), "max_minus_min_deg": floor},
        "two_noise_floors_deg": FLOOR_FACTOR * floor,
        "rms_goal_deg": goal,
        "first_trial_on_strike": first,
        "faults_after_trial_3": late_faults,
        "faults": [r["trial"] for r in rows if r["fault"]],
        "curve_rms_deg": rms,
        "curve_strike_angle_error_deg": [r["strike_angle_error_deg"] for r in rows],
        "curve_strike_speed_error_pct": [r["strike_speed_error_pct"] for r in rows],
        "last_peak_pressure_kpa": rows[-1]["peak_pressure_kpa"] if rows else None,
        "last_active_limits": rows[-1].get("active_limits") if rows else None,
        "last_update_message": rows[-1].get("update_message") if rows else None,
        "verdict": summary.get("verdict"),
        "seconds": {"tune": t_tune, "case": time.perf_counter() - t0},
    }
    if drifting:
        kept, worst = _drift_check(rms, min(replay_rms))
        checks["drift_kept_within_2x_of_best"] = kept
        out["drift_worst_ratio_to_best_so_far"] = worst
        out["drift_worst_ratio_to_best_trial"] = _drift_check(rms)[1]
    out["checks"] = checks
    out["passed"] = all(checks.values())
    out["matched_prior"] = _reach(raw, trials) if reach else None
    if spsa_summary is not None:
        n_spsa = first_on_strike(spsa_summary["trials"])
        n_learn = None if first is None else first + 1            # trials used, counting from one
        out["spsa"] = {"budget": SPSA_BUDGET, "trials_to_goal": None if n_spsa is None else n_spsa + 1,
                       "best_rms_deg": min(r["rms_error_deg"] for r in spsa_summary["trials"]),
                       "learned_trials_to_goal": n_learn,
                       "spsa_over_learned_trials": ((n_spsa + 1) / n_learn) if (n_spsa is not None and n_learn)
                       else None,
                       "spsa_over_learned_at_least": (SPSA_BUDGET / n_learn) if (n_learn and n_spsa is None)
                       else None}
    return out


_LIMIT = None        # the workers' BLAS limit, kept for the life of the process


def _pin_blas() -> None:
    """Worker start: every BLAS library on one thread for the life of the process."""
    import numpy.linalg  # noqa: F401
    import scipy.linalg  # noqa: F401
    from threadpoolctl import threadpool_limits

    global _LIMIT
    _LIMIT = threadpool_limits(limits=1, user_api="blas")


def cases(draws: int, spsa: bool, reach: bool):
    """(name, raw config, with SPSA, with the reach reference) of the demo, every named scenario
    and ``draws`` random draws; draw i is ``draw_scenario(demo, numpy.random.default_rng(i))``."""
    demo = yaml.safe_load((ROOT / "configs" / "flipper.yaml").read_text())
    out = [("demo", demo, spsa, reach)]
    for path in sorted((ROOT / "configs" / "scenarios").glob("*.yaml")):
        out.append((f"scenario/{path.stem}", yaml.safe_load(path.read_text()), False, reach))
    out += [(f"draw/{i}", draw_scenario(demo, np.random.default_rng(i)), False, reach) for i in range(draws)]
    return out


def parse_override(text: str):
    """``KEY=VALUE`` of ``--set``: a dotted config key and its YAML value (``0.02``, ``8 ms``)."""
    key, sep, value = text.partition("=")
    parts = key.strip().split(".")
    if not sep or not all(p.strip() for p in parts):
        raise ValueError(f"--set: {text!r} is not allowed; must be KEY=VALUE with a dotted config key, "
                         f"e.g. learning.regularisation=0.02")
    return [p.strip() for p in parts], yaml.safe_load(value)


def with_overrides(raw: dict, overrides) -> dict:
    """``raw`` with every ``(key parts, value)`` of ``overrides`` put in (a copy)."""
    raw = copy.deepcopy(raw)
    for parts, value in overrides:
        set_value(raw, ".".join(parts), value)
    return raw


def select(todo, only):
    """The cases of ``todo`` named in ``only`` (comma-separated; None: all)."""
    if only is None:
        return todo
    wanted = [n.strip() for n in only.split(",") if n.strip()]
    names = {case[0] for case in todo}
    unknown = [n for n in wanted if n not in names]
    if unknown or not wanted:
        raise ValueError(f"--only: {(unknown or [only])[0]!r} is not allowed; must name cases of this run, "
                         f"e.g. demo, scenario/finger, draw/0 (draws 0..{sum(n.startswith('draw/') for n in names) - 1})")
    return [case for case in todo if case[0] in wanted]


def comparison(results, old: dict) -> dict:
    """Verdict changes and RMS-after-10 ratios (new / old) against an earlier run's JSON."""
    before = {c["name"]: c for c in old.get("cases", [])}
    common = [r for r in results if r["name"] in before]
    ratios = [r["rms_after_10_trials_deg"] / before[r["name"]]["rms_after_10_trials_deg"] for r in common
              if r["rms_after_10_trials_deg"] and before[r["name"]]["rms_after_10_trials_deg"]]
    return {"cases_in_both": len(common),
            "passed_before": sum(bool(before[r["name"]]["passed"]) for r in common),
            "passed_now": sum(bool(r["passed"]) for r in common),
            "now_passing": [r["name"] for r in common if r["passed"] and not before[r["name"]]["passed"]],
            "now_failing": [r["name"] for r in common if not r["passed"] and before[r["name"]]["passed"]],
            "median_rms10_ratio_new_over_old": statistics.median(ratios) if ratios else None}


def _summary(results, prefix):
    group = [r for r in results if r["name"].startswith(prefix)]
    keys = sorted({k for r in group for k in r["checks"]})
    reached = [r for r in group if r["checks"]["strike_by_trial_12"]
               or (r["matched_prior"] and r["matched_prior"]["reached_by_trial_12"])]
    referenced = any(r["matched_prior"] for r in group)
    return {"cases": len(group), "passed": sum(r["passed"] for r in group),
            "pass_fraction": (sum(r["passed"] for r in group) / len(group)) if group else None,
            "check_passes": {k: sum(bool(r["checks"].get(k)) for r in group if k in r["checks"]) for k in keys},
            "failed": [r["name"] for r in group if not r["passed"]],
            "reached_by_matched_prior": sum(bool(r["matched_prior"] and r["matched_prior"]["reached_by_trial_12"])
                                            for r in group) if referenced else None,
            "shown_within_reach": len(reached) if referenced else None,
            "passed_of_shown_within_reach": sum(r["passed"] for r in reached) if referenced else None,
            "pass_fraction_of_shown_within_reach": (sum(r["passed"] for r in reached) / len(reached))
            if (referenced and reached) else None,
            "not_shown_within_reach": [r["name"] for r in group if r not in reached] if referenced else None}


def _line(r) -> str:
    c = r["checks"]
    rms10 = r["rms_after_10_trials_deg"]
    return (f"{r['name']:28s} model-only {r['model_only']['rms_error_deg']:6.2f} deg | rms@10 "
            f"{rms10 if rms10 is not None else float('nan'):6.3f} (x{r['rms_ratio_model_only_over_after_10'] or 0:6.1f}, "
            f"2 floors {r['two_noise_floors_deg']:.4f}) {'ok' if c['rms_goal_met'] else '--'} | strike at "
            f"{r['first_trial_on_strike']} {'ok' if c['strike_by_trial_12'] else '--'} | late faults "
            f"{len(r['faults_after_trial_3'])}"
            + (f" | drift worst {r['drift_worst_ratio_to_best_so_far']:.2f}x "
               f"{'ok' if c['drift_kept_within_2x_of_best'] else '--'}" if r["drift"] else "")
            + f" | {'PASS' if r['passed'] else 'fail'}"
            + (f" | matched prior: strike at {r['matched_prior']['first_trial_on_strike']}" if r["matched_prior"] else "")
            + f" ({r['seconds']['case']:.0f} s)")


def main(argv=None) -> dict:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--draws", type=int, default=50, help="random draws (default 50)")
    parser.add_argument("--jobs", type=int, default=1, help="worker processes (default 1)")
    parser.add_argument("--no-spsa", action="store_true", help="skip the SPSA comparison on the demo")
    parser.add_argument("--no-reach", action="store_true", help="skip the matched-prior reach reference")
    parser.add_argument("--out", type=Path, default=ROOT / "benchmarks" / "results" / "learning.json",
                        help="where to write the JSON (default benchmarks/results/learning.json)")
    parser.add_argument("--set", dest="overrides", action="append", default=[], metavar="KEY=VALUE",
                        help="config value put into every case, e.g. learning.regularisation=0.02 (repeatable)")
    parser.add_argument("--only", help="comma-separated case names to run, e.g. demo,scenario/finger,draw/40")
    parser.add_argument("--compare", type=Path, help="an earlier learning.json to compare the verdicts with")
    args = parser.parse_args(argv)
    try:
        overrides = [parse_override(text) for text in args.overrides]
        todo = select(cases(args.draws, not args.no_spsa, not args.no_reach), args.only)
        old = None
        if args.compare is not None:
            try:
                old = json.loads(args.compare.read_text())
            except (OSError, ValueError) as exc:
                raise ValueError(f"--compare: {str(args.compare)!r} cannot be read as a learning.json "
                                 f"({type(exc).__name__}); must be the JSON of an earlier run") from None
            listed = old.get("cases") if isinstance(old, dict) else None
            if not isinstance(listed, list) or not all(isinstance(c, dict) and {"name", "passed",
                                                       "rms_after_10_trials_deg"} <= set(c) for c in listed):
                raise ValueError(f"--compare: {str(args.compare)!r} has no cases of a learning run; must be "
                                 f"the JSON this benchmark writes")
        for name, raw, *_ in todo:
            Setup.from_config(with_overrides(raw, overrides))     # a bad value fails here, on one line
    except (ValueError, OSError) as exc:
        parser.error(str(exc).splitlines()[0])
    todo = [(name, with_overrides(raw, overrides), *rest) for name, raw, *rest in todo]
    t0 = time.perf_counter()
    results = []
    context = multiprocessing.get_context("spawn")
    with concurrent.futures.ProcessPoolExecutor(max_workers=max(1, args.jobs), mp_context=context,
                                                initializer=_pin_blas) as pool:
        futures = {pool.submit(run_case, *case): case[0] for case in todo}
        for future in concurrent.futures.as_completed(futures):
            r = future.result()
            results.append(r)
            print(_line(r), flush=True)
    order = {case[0]: i for i, case in enumerate(todo)}
    results.sort(key=lambda r: order[r["name"]])
    named, drawn = _summary(results, "scenario/"), _summary(results, "draw/")
    out = {"benchmark": "learning", "python": platform.python_version(), "numpy": np.__version__,
           "machine": platform.machine(), "jobs": args.jobs, "draws": args.draws,
           "overrides": args.overrides, "only": args.only,
           "wall_seconds": time.perf_counter() - t0,
           "definitions": {
               "trial": "index of a measured trial from 0; trial 0 runs the model-only profile",
               "rms_after_10_trials_deg": f"RMS swing error of trial {RMS_TRIAL}",
               "noise_floor": f"max - min RMS of the final profile replayed on {NOISE_REPEATS} fresh noise seeds "
                              f"at trial index {RMS_TRIAL}",
               "rms_goal_deg": f"max(model-only RMS / {RMS_RATIO_GOAL:g}, {FLOOR_FACTOR:g} x noise floor)",
               "strike_goal": f"|angle error| <= {ANGLE_GOAL} deg and |speed error| <= {SPEED_GOAL} % by trial "
                              f"{STRIKE_BY}",
               "faults": f"trials after trial {FAULTS_AFTER} ending in an end-stop slam or divergence",
               "drift": f"every RMS of trials {DRIFT_WINDOW[0]}..{DRIFT_WINDOW[1]} <= {DRIFT_FACTOR:g} x the best "
                        f"RMS so far, taken no lower than the best noise-floor replay ({DRIFT_TRIALS} trials where "
                        f"the plant drifts; drift_worst_ratio_to_best_trial gives the strict ratio)",
               "tune": f"controllers.tuning.tune(setup, 'norm-optimal', {TRIALS} (or {DRIFT_TRIALS}), seed={SEED})",
               "draw_i": "muscle_sim.scenarios.draw_scenario(configs/flipper.yaml, numpy.random.default_rng(i))",
               "matched_prior": "the same tune run with muscle_sim.scenarios.with_matched_prior",
               "shown_within_reach": "strike met by trial 12 in the run itself or with the matched prior"},
           "goal": {"random_draw_pass_fraction": f">= {DRAW_GOAL:g}", "rms_ratio_after_10_trials": f">= {RMS_RATIO_GOAL:g}",
                    "spsa_over_learned_trials": ">= 20"},
           "summary": {"named": named, "random_draws": {**drawn, "goal_met": (drawn["pass_fraction"] or 0) >= DRAW_GOAL
                                                        if drawn["cases"] else None},
                       "demo": next(({k: r[k] for k in ("passed", "rms_after_10_trials_deg",
                                                        "rms_ratio_model_only_over_after_10", "first_trial_on_strike",
                                                        "spsa") if k in r} for r in results if r["name"] == "demo"),
                                    None)},
           "cases": results}
    if old is not None:
        out["comparison"] = {"against": str(args.compare), **comparison(results, old)}
    write_json_atomic(args.out, out)
    print(f"named scenarios: {named['passed']}/{named['cases']} pass; random draws: {drawn['passed']}/{drawn['cases']}"
          f" pass (goal >= {DRAW_GOAL:.0%}); {drawn['shown_within_reach']} draws shown within reach, of which "
          f"{drawn['passed_of_shown_within_reach']} pass; {out['wall_seconds']:.0f} s with {args.jobs} job(s)")
    if old is not None:
        c = out["comparison"]
        print(f"against {args.compare}: {c['passed_before']} -> {c['passed_now']} of {c['cases_in_both']} pass; now "
              f"passing {', '.join(c['now_passing']) or '-'}; now failing {', '.join(c['now_failing']) or '-'}; "
              f"median RMS-after-10 ratio new / old {c['median_rms10_ratio_new_over_old']}")
    return out


if __name__ == "__main__":
    main()
