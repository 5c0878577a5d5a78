"""Sweeps over plant variations: a spec of varied keys -> samples -> one job per sample (tune,
compare or run) on local worker processes or a Dask cluster -> per-sample records, table, figures.

A sweep spec (YAML) names a base config, the config keys to vary (grids, or uniform, log-uniform
and normal draws, values with units), the number of samples, the job each sample runs and a seed.
Sample ``i`` is a pure function of the spec and ``i``: grid point ``i mod G`` of the grids'
product (in the order the keys are listed), each drawn key from
``numpy.random.default_rng([seed, i, crc32(key)])`` (adding a key leaves the other keys' draws
as they were), and the job's noise seed from ``numpy.random.SeedSequence([seed, i])`` unless the
spec fixes ``noise_seed`` for every sample. ``scenario: random-mismatch`` first draws the whole
mismatch of :func:`muscle_sim.scenarios.draw_scenario` with ``default_rng(first_draw + i)`` (the
learning benchmark's draw ``first_draw + i``), then applies the varied keys.

:func:`run_sample` is the one job function, ``(spec, i) -> record``; it never raises: an error
or a diverged simulation is recorded in the sample's record with status ``"failed"``. The
executors only decide where it runs: :func:`_run_local` (a process pool, at most one sample per
worker in flight, a pool that lost a worker is replaced and its samples rerun) or
:func:`_run_on_dask` (``client.map`` / ``as_completed`` on an existing ``dask.distributed``
scheduler, whose own retries rerun the samples of a lost worker). The client writes each record
atomically as it arrives (``samples/sample-NNNNNN.json``), so ``resume`` skips what is done, and
builds ``sweep.json``, ``samples.csv`` and the figures from those files: the same files give the
same bytes, however the samples were run.
"""
from __future__ import annotations

import copy
import csv
import hashlib
import io
import json
import math
import os
import shutil
import socket
import tempfile
import time
import zlib
from collections import deque
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import yaml

from . import config as _config
from . import safety
from .errors import ConfigError
from .records import save_figure_atomic, write_json_atomic, write_text_atomic
from .report import config_text, write_report
from .threads import single_blas_thread
from .units import UNITS, to_si, UnitError

JOBS = ("tune", "compare", "run")
DISTRIBUTIONS = ("grid", "uniform", "log_uniform", "normal")
#: How often a sample is started before a lost worker process counts as its failure (local pool).
MAX_ATTEMPTS = 3
#: Seconds to wait for a Dask scheduler to answer.
CONNECT_TIMEOUT = 10.0

#: The job section of a spec. Options of the other kinds are refused (see :data:`JOB_OPTIONS`).
JOB_KEYS = dict(
    kind=_config.Key("str", "the job each sample runs", choices=JOBS),
    trials=_config.Key("int", "learning trials of tune and compare (default: the config's learning.trials)",
                       default=None, low=1, high=100000),
    drift_trials=_config.Key("int", "tune: learning trials where the sample's plant drifts (default: trials)",
                             default=None, low=1, high=100000),
    method=_config.Key("str", "update rule (default: the config's learning.method; compare: not spsa)",
                       default=None, choices=("norm-optimal", "gradient", "spsa")),
    episodes=_config.Key("int", "run: episodes per sample", default=1, low=1, high=100000),
    controller=_config.Key("str", "run: open-loop controller", default="hold", choices=("hold", "step", "replay")),
    pressures=_config.Key("pressure", "run: the two commands of hold or step, e.g. [4 bar, 1 bar]", default=None,
                          many=True, low=0, unit="bar"),
    step_at=_config.Key("time", "run: when the step controller switches", default=0.1, low=0, unit="ms"),
    profile=_config.Key("str", "run: profile CSV replayed (relative to the spec)", default=None),
)
JOB_OPTIONS = {"tune": ("trials", "drift_trials", "method"), "compare": ("trials", "method"),
               "run": ("episodes", "controller", "pressures", "step_at", "profile")}

#: The top level of a spec (``vary`` is read on its own: its keys are config key paths).
SPEC_KEYS = dict(
    name=_config.Key("str", "a short name of the sweep", default=""),
    description=_config.Key("str", "free text", default=""),
    base=_config.Key("str", "the base config (YAML path, relative to the spec)"),
    seed=_config.Key("int", "seed of the draws and of the samples' noise", default=0, low=0),
    samples=_config.Key("int", "number of samples (default: the size of the grid)", default=None, low=1,
                        high=1_000_000),
    scenario=_config.Key("str", "random-mismatch: sample i starts from draw_scenario(base, default_rng(first_draw "
                         "+ i))", default=None, choices=("random-mismatch",)),
    first_draw=_config.Key("int", "random-mismatch: the draw of sample 0", default=0, low=0),
    noise_seed=_config.Key("int", "one noise seed for every sample's job (default: from (seed, i))", default=None,
                           low=0),
    job=JOB_KEYS,
)

#: Outcome metrics of every sample, in the order of the table's columns.
METRICS = ("success", "model_only_rms_deg", "learned_rms_deg", "rms_ratio", "rms_deg", "strike_angle_error_deg",
           "strike_speed_error_pct", "peak_pressure_kpa", "trials_to_strike", "trials", "faults", "cause")


class SweepError(ValueError):
    """A sweep cannot start or continue (one-line message naming the option or folder)."""


# --- the spec --------------------------------------------------------------------------------

def _fmt(value) -> str:
    text = repr(value)
    return text if len(text) <= 60 else text[:57] + "..."


def _read_yaml(path: Path, what: str):
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigError(f"{what}: cannot read {str(path)!r}: {exc.strerror or exc}") from None
    try:
        return yaml.safe_load(text)
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = f" at line {mark.line + 1}" if mark is not None else ""
        raise ConfigError(f"{what}: {str(path)!r} is not valid YAML{where}") from None


def _si_unit(kind: str) -> str:
    """The SI unit of a quantity kind ('' for dimensionless and non-quantities)."""
    return next(iter(UNITS[kind])) if kind in UNITS else ""


def _pair(where: str, key, value, what: str) -> list:
    if not isinstance(value, list) or len(value) != 2:
        example = "['0.05 kg', '0.3 kg']" if what == "low, high" else "{mean: 0.1 kg, std: 20 g}"
        raise ConfigError(f"{where}: {_fmt(value)} is not allowed; must be [{what}], e.g. {example}")
    return [_config.convert_value(f"{where}[{n}]", key, v) for n, v in enumerate(value)]


def _vary_entry(name: str, rule) -> dict:
    """One ``vary`` entry checked and in SI: ``{key, kind, unit, distribution, ...}``."""
    where = f"vary.{name}"
    key = _config.schema_key(name, where)
    if name in ("name", "description") or key.many:
        raise ConfigError(f"{where}: {name!r} is not allowed; must be a key with one value")
    if isinstance(rule, list):                      # shorthand: a list is a grid
        rule = {"grid": rule}
    if not isinstance(rule, dict) or len(rule) != 1:
        raise ConfigError(f"{where}: {_fmt(rule)} is not allowed; must be one of {', '.join(DISTRIBUTIONS)}, "
                          f"e.g. {{uniform: ['0.05 kg', '0.3 kg']}}")
    (how, spec), = rule.items()
    entry = {"key": name, "kind": key.kind, "unit": _si_unit(key.kind), "distribution": how}
    where = f"{where}.{how}"
    if how not in DISTRIBUTIONS:
        raise ConfigError(f"{where}: unknown distribution; allowed: {', '.join(DISTRIBUTIONS)}")
    if how == "grid":
        if not isinstance(spec, list) or not spec:
            raise ConfigError(f"{where}: {_fmt(spec)} is not allowed; must be a non-empty list of values")
        entry["values"] = [_config.convert_value(f"{where}[{n}]", key, v) for n, v in enumerate(spec)]
        return entry
    if key.kind not in UNITS:
        raise ConfigError(f"{where}: not allowed for {name!r} (a {key.kind} key); use grid")
    if how in ("uniform", "log_uniform"):
        low, high = _pair(where, key, spec, "low, high")
        if not low < high:
            raise ConfigError(f"{where}: {_fmt(spec)} is not allowed; the low end must be below the high end")
        if how == "log_uniform" and low <= 0:
            raise ConfigError(f"{where}[0]: {_fmt(spec[0])} is not allowed; a log-uniform draw needs a low end > 0")
        entry.update(low=low, high=high)
        return entry
    if not isinstance(spec, dict) or set(spec) != {"mean", "std"}:
        raise ConfigError(f"{where}: {_fmt(spec)} is not allowed; must be {{mean: ..., std: ...}}, "
                          f"e.g. {{mean: 0.1 kg, std: 20 g}}")
    mean = _config.convert_value(f"{where}.mean", key, spec["mean"])
    try:
        std = to_si(spec["std"], key.kind)
    except UnitError as exc:
        raise ConfigError(f"{where}.std: {exc}") from None
    if not std > 0:
        raise ConfigError(f"{where}.std: {_fmt(spec['std'])} is not allowed; must be > 0")
    entry.update(mean=mean, std=std)
    return entry


def load_spec(source) -> dict:
    """Read and check a sweep spec (YAML path or mapping) into a plain, picklable dict in SI.

    The dict holds the base config's raw mapping itself (workers need no files), the varied keys
    (:func:`_vary_entry`), the job options, ``samples`` and a ``digest`` of all of it. Every error
    is a one-line ConfigError naming the spec key, the value and what is allowed."""
    if isinstance(source, (str, Path)):
        path = Path(source)
        raw = _read_yaml(path, "spec")
        folder, name = path.parent, str(path)
    else:
        raw, folder, name = copy.deepcopy(source), Path.cwd(), "<mapping>"
    if not isinstance(raw, dict):
        raise ConfigError(f"spec: {_fmt(raw)} is not allowed; must be a mapping of keys (base, vary, samples, job, "
                          f"seed)")
    vary_raw = raw.pop("vary", None) or {}
    values = _config.validate_section(SPEC_KEYS, raw, "")
    if not isinstance(vary_raw, dict):
        raise ConfigError(f"vary: {_fmt(vary_raw)} is not allowed; must be a mapping of config keys, e.g. "
                          f"plant.joint.payload_mass: {{uniform: ['0.05 kg', '0.3 kg']}}")
    vary = [_vary_entry(str(k), rule) for k, rule in vary_raw.items()]
    job = values["job"]
    for option in JOB_KEYS:
        if option != "kind" and option in (raw.get("job") or {}) and option not in JOB_OPTIONS[job["kind"]]:
            raise ConfigError(f"job.{option}: not allowed for kind {job['kind']}; its options: "
                              f"{', '.join(JOB_OPTIONS[job['kind']])}")
    if job["kind"] == "compare" and job["method"] == "spsa":
        raise ConfigError("job.method: 'spsa' is not allowed for kind compare; must be norm-optimal or gradient "
                          "(compare runs SPSA beside it)")
    if job["kind"] == "run":
        if job["pressures"] is not None and len(job["pressures"]) != 2:
            raise ConfigError(f"job.pressures: {_fmt(raw['job']['pressures'])} is not allowed; must be two "
                              f"pressures [A, B], e.g. [4 bar, 1 bar]")
        if job["controller"] == "step" and job["pressures"] is None:
            raise ConfigError("job.pressures: missing; controller step needs the two pressures after the step, "
                              "e.g. [4 bar, 1 bar]")
        if job["controller"] == "replay":
            if not job["profile"]:
                raise ConfigError("job.profile: missing; controller replay needs a profile CSV")
            from controllers.base import PressureProfile

            job["profile"] = str(folder / job["profile"])
            job["profile_table"] = PressureProfile.read_csv(job["profile"]).to_csv_text()
    base_path = folder / values["base"]
    base_raw = _read_yaml(base_path, "base")
    try:
        base = _config.load(base_raw)
    except ConfigError as exc:
        raise ConfigError(f"base: {base_path}: {exc}") from None
    grid = math.prod(len(e["values"]) for e in vary if e["distribution"] == "grid")
    drawn = values["scenario"] is not None or any(e["distribution"] != "grid" for e in vary)
    samples = values["samples"]
    if samples is None:
        if drawn or not vary:
            raise ConfigError("samples: missing; required when keys are drawn, a scenario is drawn or nothing "
                              "varies (a grid alone gives its size)")
        samples = grid
    spec = {"source": name, "name": values["name"], "description": values["description"],
            "base_source": str(base_path), "base": base_raw, "base_hash": base.digest, "seed": values["seed"],
            "samples": samples, "grid_points": grid, "scenario": values["scenario"],
            "first_draw": values["first_draw"], "noise_seed": values["noise_seed"], "job": job, "vary": vary}
    spec["digest"] = spec_digest(spec)
    return spec


def spec_digest(spec: dict) -> str:
    """Hash of everything that decides the samples' results (not where the spec file lies)."""
    decisive = {k: v for k, v in spec.items() if k not in ("source", "base_source", "digest")}
    return hashlib.sha256(json.dumps(decisive, sort_keys=True, default=str).encode()).hexdigest()[:16]


# --- one sample ------------------------------------------------------------------------------

def _draw(entry: dict, seed: int, index: int, point: dict):
    how = entry["distribution"]
    if how == "grid":
        return entry["values"][point[entry["key"]]]
    rng = np.random.default_rng([seed, index, zlib.crc32(entry["key"].encode())])
    if how == "uniform":
        return float(rng.uniform(entry["low"], entry["high"]))
    if how == "log_uniform":
        return float(math.exp(rng.uniform(math.log(entry["low"]), math.log(entry["high"]))))
    return float(entry["mean"] + entry["std"] * rng.standard_normal())


def _grid_point(spec: dict, index: int) -> dict:
    """Index into each grid of grid point ``index mod G`` (the first listed key varies slowest)."""
    grids = [e for e in spec["vary"] if e["distribution"] == "grid"]
    rest, point = index % spec["grid_points"], {}
    for entry in reversed(grids):
        rest, point[entry["key"]] = divmod(rest, len(entry["values"]))
    return point


def _as_written(kind: str, value):
    """An SI value as a config value: with its SI unit where the kind has units."""
    if kind in UNITS and kind != "dimensionless":
        return f"{value!r} {_si_unit(kind)}"
    return value


def set_value(raw: dict, dotted: str, value) -> None:
    """Put ``value`` at the dotted key of a raw config (in place), making sections as needed."""
    *head, last = dotted.split(".")
    node = raw
    for part in head:
        if not isinstance(node.get(part), dict):
            node[part] = {}
        node = node[part]
    node[last] = value


def _flat(values: dict, prefix: str = ""):
    for name, value in values.items():
        if isinstance(value, dict):
            yield from _flat(value, f"{prefix}{name}.")
        else:
            yield f"{prefix}{name}", value


def sample_plan(spec: dict, index: int) -> tuple:
    """``(raw config, values)`` of sample ``index``: the config as written (units) and the sampled
    values in SI by key path (for a drawn scenario also every key the draw changed)."""
    raw = copy.deepcopy(spec["base"])
    values = {}
    if spec["scenario"] == "random-mismatch":
        from .scenarios import draw_scenario

        raw = draw_scenario(raw, np.random.default_rng(spec["first_draw"] + index))
        base = dict(_flat(_config.load(spec["base"]).values))
        drawn = _config.load(raw).values
        values.update({k: v for k, v in _flat(drawn) if k not in ("name", "description") and v != base.get(k)})
    point = _grid_point(spec, index)
    for entry in spec["vary"]:
        value = _draw(entry, spec["seed"], index, point)
        set_value(raw, entry["key"], _as_written(entry["kind"], value))
        values[entry["key"]] = value
    return raw, values


def noise_seed(spec: dict, index: int) -> int:
    """The seed of sample ``index``'s job (its trials' noise and drift)."""
    if spec["noise_seed"] is not None:
        return spec["noise_seed"]
    return int(np.random.SeedSequence([spec["seed"], index]).generate_state(1)[0])


def _one_line(exc: BaseException) -> str:
    text = " ".join(str(exc).split()) or "(no message)"
    text = text if len(text) <= 400 else text[:397] + "..."
    return f"{type(exc).__name__}: {text}"


def _reached(row) -> bool:
    from controllers.tuning import strike_reached

    return strike_reached(row)


def _learning_metrics(rows, model_only, final, verdict) -> dict:
    reached = [r["trial"] for r in rows if _reached(r)]
    learned = final["rms_error_deg"]
    return {"success": bool(reached), "model_only_rms_deg": model_only, "learned_rms_deg": learned,
            "rms_ratio": learned / model_only if learned is not None and model_only else None,
            "rms_deg": learned, "strike_angle_error_deg": final["strike_angle_error_deg"],
            "strike_speed_error_pct": final["strike_speed_error_pct"], "peak_pressure_kpa": final["peak_pressure_kpa"],
            "trials_to_strike": reached[0] if reached else None, "trials": len(rows),
            "faults": sum(1 for r in rows if r["fault"]), "cause": (verdict or {}).get("cause"),
            "rms_by_trial": [r["rms_error_deg"] for r in rows]}


def _tune_job(setup, job: dict, seed: int, folder: Path) -> tuple:
    from controllers.tuning import tune

    trials = job["trials"] or setup.config.get("learning.trials")
    if setup.drift.active and job["drift_trials"]:
        trials = job["drift_trials"]
    summary = tune(setup, job["method"] or setup.config.get("learning.method"), trials, seed, folder)
    rows = summary["trials"]
    # trial 0 runs the model-only feedforward (tune starts from it)
    return _learning_metrics(rows, rows[0]["rms_error_deg"], rows[-1], summary["verdict"]), rows


def _compare_job(setup, job: dict, seed: int, folder: Path) -> tuple:
    from controllers.comparison import compare

    trials = job["trials"] or setup.config.get("learning.trials")
    data = compare(setup, trials, seed, folder, method=job["method"] or setup.config.get("learning.method"))
    learned = json.loads((folder / "learned" / "summary.json").read_text())
    rows, evaluated = learned["trials"], data["controllers"]
    metrics = _learning_metrics(rows, evaluated["model-only"]["rms_error_deg"], evaluated["learned"],
                                learned.get("verdict"))
    metrics["success"] = _reached(evaluated["learned"]) and not evaluated["learned"]["fault"]
    metrics["controllers"] = evaluated
    return metrics, rows


def _run_job(setup, job: dict, seed: int, folder: Path) -> tuple:
    from controllers.base import PressureProfile
    from controllers.simple import open_loop_controller
    from .runs import run_episodes

    profile = None
    if job["controller"] == "replay":
        path = folder / "replayed_profile.csv"
        write_text_atomic(path, job["profile_table"])
        profile = PressureProfile.read_csv(path)
    controller = open_loop_controller(job["controller"], job["pressures"], job["step_at"], profile,
                                      source=job["profile"] or "profile")
    rows = run_episodes(setup, controller, job["episodes"], seed, folder, progress=None)["episodes"]
    final = rows[-1]
    return {"success": all(_reached(r) and not r["fault"] for r in rows), "model_only_rms_deg": None,
            "learned_rms_deg": None, "rms_ratio": None, "rms_deg": final["rms_error_deg"],
            "strike_angle_error_deg": final["strike_angle_error_deg"],
            "strike_speed_error_pct": final["strike_speed_error_pct"], "peak_pressure_kpa": final["peak_pressure_kpa"],
            "trials_to_strike": None, "trials": len(rows), "faults": sum(1 for r in rows if r["fault"]),
            "cause": None, "rms_by_trial": [r["rms_error_deg"] for r in rows]}, rows


_JOBS = {"tune": _tune_job, "compare": _compare_job, "run": _run_job}


@single_blas_thread
def run_sample(spec: dict, index: int, work_root=None) -> dict:
    """Sample ``index`` of ``spec``: its config, its job, and the record of the outcome.

    Never raises for the sample's own faults: a config the draw made invalid, an error of the job
    or a diverged simulation gives ``status: "failed"`` with ``error`` (one line); the values are
    recorded either way. The job runs in a temporary folder under ``work_root`` (default: the
    system's), removed afterwards; the record carries what the sweep keeps."""
    from .simulation import Setup

    t0 = time.perf_counter()
    record = {"sample": index, "status": "ok", "values": {}, "metrics": None, "error": None, "cautions": []}
    try:
        raw, record["values"] = sample_plan(spec, index)
        setup = Setup.from_config(raw)
        if setup.over_rated:
            record["cautions"].append(safety.over_rated(setup.plant.pneumatics.supply_pressure / 1e5,
                                                        setup.rated_pressure / 1e5))
        if work_root is not None:
            Path(work_root).mkdir(parents=True, exist_ok=True)
        with tempfile.TemporaryDirectory(prefix=f"sample-{index:06d}-", dir=work_root) as folder:
            record["metrics"], rows = _JOBS[spec["job"]["kind"]](setup, spec["job"], noise_seed(spec, index),
                                                                 Path(folder))
        diverged = [(r.get("trial", r.get("episode")), r["fault"]) for r in rows
                    if r["fault"] and r["fault"].startswith("simulation diverged")]
        if diverged:
            record["status"], record["error"] = "failed", f"trial {diverged[0][0]}: {diverged[0][1]}"
    except Exception as exc:  # noqa: BLE001 - one sample's failure is recorded, the sweep goes on
        record["status"], record["error"] = "failed", _one_line(exc)
    record["seconds"] = time.perf_counter() - t0
    record["worker"] = f"{socket.gethostname()}:{os.getpid()}"
    return record


def _lost_record(spec: dict, index: int, why: str) -> dict:
    """The record of a sample whose worker was lost every time it ran."""
    try:
        values = sample_plan(spec, index)[1]
    except Exception:  # noqa: BLE001 - the record names the loss, the values are a courtesy
        values = {}
    return {"sample": index, "status": "failed", "values": values, "metrics": None, "error": why, "cautions": [],
            "seconds": None, "worker": None}


# --- executors -------------------------------------------------------------------------------

def _warm_worker() -> None:
    """Start of a local worker: import what the jobs use (scipy's signal tools, matplotlib, the
    learner), so the worker's start-up is not counted in its first sample."""
    import matplotlib.figure  # noqa: F401
    import scipy.signal  # noqa: F401

    import controllers.comparison  # noqa: F401
    import controllers.identification  # noqa: F401
    from . import runs  # noqa: F401


def _run_local(spec, todo, workers: int, deliver, work_root) -> None:
    """Run ``todo`` on ``workers`` spawned processes (0: in this process), at most one sample per
    worker in flight; ``deliver(index, record, attempts, handed_at)`` as each completes. A worker
    that dies breaks the pool: the samples then running are started again on a fresh pool, up to
    :data:`MAX_ATTEMPTS` times each."""
    if workers == 0:
        for i in todo:
            handed_at = time.perf_counter()
            deliver(i, run_sample(spec, i, work_root), 1, handed_at)
        return
    import multiprocessing
    from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
    from concurrent.futures.process import BrokenProcessPool

    context = multiprocessing.get_context("spawn")
    queue, attempts = deque(todo), {i: 0 for i in todo}
    while queue:
        lost = []
        pool = ProcessPoolExecutor(max_workers=min(workers, len(queue)), mp_context=context,
                                   initializer=_warm_worker)
        running = {}
        try:
            while queue or running:
                while queue and len(running) < workers and not lost:
                    i = queue.popleft()
                    attempts[i] += 1
                    running[pool.submit(run_sample, spec, i, work_root)] = (i, time.perf_counter())
                if not running:
                    break
                done, _ = wait(running, return_when=FIRST_COMPLETED)
                for future in done:
                    i, handed_at = running.pop(future)
                    try:
                        record = future.result()
                    except BrokenProcessPool:
                        lost.append(i)
                        continue
                    deliver(i, record, attempts[i], handed_at)
        finally:
            pool.shutdown(wait=True, cancel_futures=True)
        for i in reversed(lost):
            if attempts[i] < MAX_ATTEMPTS:
                queue.appendleft(i)
            else:
                deliver(i, _lost_record(spec, i, f"worker process lost {attempts[i]} times while running this "
                                                  f"sample"), attempts[i], None)


def _run_on_dask(spec, todo, address: str, deliver) -> None:
    """Run ``todo`` on the ``dask.distributed`` scheduler at ``address`` (``client.map`` and
    ``as_completed``); the scheduler reruns the tasks of a lost worker (its
    ``distributed.scheduler.allowed-failures``), after which the sample is recorded as failed."""
    try:
        from dask.distributed import Client, as_completed
    except ImportError:
        raise SweepError("--scheduler: dask.distributed is not installed; install the cluster extra "
                         "(pip install 'pamjoint[cluster]') or leave --scheduler out to use local processes") from None
    try:
        client = Client(address, timeout=CONNECT_TIMEOUT)
    except (OSError, TimeoutError, ValueError) as exc:
        raise SweepError(f"--scheduler: {address!r} does not answer ({_one_line(exc)}); start one with "
                         f"`dask scheduler` and give the address it prints") from None
    with client:
        shared = client.scatter([spec], broadcast=True)[0]     # a list: a dict would be scattered per key
        keys = [f"pamjoint-sample-{spec['digest']}-{i:06d}" for i in todo]
        handed_at = time.perf_counter()
        futures = client.map(run_sample, [shared] * len(todo), todo, key=keys)
        index = {f.key: i for f, i in zip(futures, todo)}
        for future in as_completed(futures):
            i = index[future.key]
            try:
                record = future.result()
            except Exception as exc:  # noqa: BLE001 - e.g. KilledWorker after the scheduler's retries
                record = _lost_record(spec, i, f"lost on the cluster: {_one_line(exc)}")
            deliver(i, record, None, handed_at)
            future.release()


# --- the sweep folder ------------------------------------------------------------------------

def sample_path(out: Path, index: int) -> Path:
    """Where sample ``index``'s record lies in the sweep folder."""
    return Path(out) / "samples" / f"sample-{index:06d}.json"


def _finished(out: Path, spec: dict) -> dict:
    """Records already in ``out``, by sample index (only those of this spec's samples)."""
    found = {}
    for path in sorted((Path(out) / "samples").glob("sample-*.json")):
        record = json.loads(path.read_text(encoding="utf-8"))
        if 0 <= record["sample"] < spec["samples"]:
            found[record["sample"]] = record
    return found


def _prepare(out: Path, spec: dict, resume: bool) -> dict:
    """Check or start the sweep folder; the records already finished (resume)."""
    stored = out / "spec.json"
    if resume:
        if not stored.exists():
            raise SweepError(f"--resume: {str(out)!r} has no spec.json; nothing to resume")
        previous = json.loads(stored.read_text(encoding="utf-8"))
        if previous.get("digest") != spec["digest"]:
            raise SweepError(f"--resume: {str(out)!r} was started from another spec or base config "
                             f"(digest {previous.get('digest')}, this spec {spec['digest']})")
        for leftover in (out / "samples").glob(".*.part"):
            leftover.unlink()
        return _finished(out, spec)
    if stored.exists() or any((out / "samples").glob("sample-*.json")):
        raise SweepError(f"--out: {str(out)!r} already holds a sweep; continue it with --resume or choose "
                         f"another folder")
    write_json_atomic(stored, spec)
    return {}


@dataclass
class SweepResult:
    """What :func:`run_sweep` did: ``data`` (as written to sweep.json), the samples run now,
    and timings [s]: the whole call, per sample the job's own time and the time from handing it
    to a worker until its record came back (``latency``), and building the outputs."""

    data: dict
    ran: list = field(default_factory=list)
    wall_seconds: float = 0.0
    sample_seconds: dict = field(default_factory=dict)
    latency_seconds: dict = field(default_factory=dict)
    output_seconds: float = 0.0


class _Progress:
    """One line per finished sample: done of all, failures, time left at this run's pace."""

    def __init__(self, stream, total: int, done: int, failed: int, todo: int):
        self.stream, self.total, self.done, self.failed = stream, total, done, failed
        self.todo, self.now_done, self.t0 = todo, 0, time.perf_counter()

    def update(self, record) -> None:
        self.done += 1
        self.now_done += 1
        self.failed += record["status"] != "ok"
        if self.stream is None:
            return
        remaining = self.todo - self.now_done
        rate = self.now_done / max(time.perf_counter() - self.t0, 1e-9)
        left = f"about {_duration(remaining / rate)} left" if remaining else "all done"
        note = "" if record["status"] == "ok" else f" (sample {record['sample']}: {record['error']})"
        self.stream.write(f"sweep: {self.done}/{self.total} done, {self.failed} failed, {left}{note}\n")
        self.stream.flush()


def _duration(seconds: float) -> str:
    if seconds < 90:
        return f"{seconds:.0f} s"
    if seconds < 5400:
        return f"{seconds / 60:.0f} min"
    return f"{seconds / 3600:.1f} h"


def run_sweep(spec: dict, out, workers: int | None = None, scheduler: str | None = None, resume: bool = False,
              progress=None) -> SweepResult:
    """Run every sample of ``spec`` (from :func:`load_spec`) not yet finished in ``out`` and write
    the sweep folder: ``spec.json``, ``samples/sample-NNNNNN.json`` (each as it completes),
    then ``sweep.json``, ``samples.csv`` and the figures.

    ``workers`` local processes (default: the machine's cores; 0 runs the samples in this
    process), or the ``dask.distributed`` scheduler at ``scheduler``. ``resume`` continues a
    sweep in ``out`` started from the same spec. ``progress`` (a text stream) gets a line per
    finished sample."""
    t_start = time.perf_counter()
    out = Path(out)
    if scheduler is not None and workers is not None:
        raise SweepError("--workers: not used with --scheduler (the cluster's workers run the samples)")
    if workers is not None and workers < 0:
        raise SweepError(f"--workers: {workers} is not allowed; must be >= 0 (0: in this process)")
    slots = workers if workers is not None else (os.cpu_count() or 1)
    finished = _prepare(out, spec, resume)
    todo = [i for i in range(spec["samples"]) if i not in finished]
    result = SweepResult(data={})
    meter = _Progress(progress, spec["samples"], len(finished),
                      sum(r["status"] != "ok" for r in finished.values()), len(todo))

    def deliver(index, record, attempts, handed_at):
        record = {**record, "attempts": attempts}
        write_json_atomic(sample_path(out, index), record)
        result.ran.append(index)
        result.sample_seconds[index] = record["seconds"]
        if handed_at is not None:
            result.latency_seconds[index] = time.perf_counter() - handed_at
        meter.update(record)

    if todo and scheduler is not None:
        _run_on_dask(spec, todo, scheduler, deliver)
    elif todo:
        work = out / "work"
        shutil.rmtree(work, ignore_errors=True)        # what a killed sweep left of its jobs
        _run_local(spec, todo, slots, deliver, work)
        shutil.rmtree(work, ignore_errors=True)
    t_out = time.perf_counter()
    result.data = write_outputs(out, spec)
    result.output_seconds = time.perf_counter() - t_out
    result.wall_seconds = time.perf_counter() - t_start
    return result


# --- outputs ---------------------------------------------------------------------------------

def _columns(spec: dict, records: list) -> list:
    """Varied key paths in table order: the spec's keys as listed, then those a scenario changed."""
    keys = [e["key"] for e in spec["vary"]]
    schema_order = [k for k, _ in _config.schema_keys()]
    drawn = {k for r in records for k in r["values"] if k not in keys}
    return keys + [k for k in schema_order if k in drawn]


def _kind(key: str) -> str:
    return _config.schema_key(key).kind


def _public(record: dict, columns: list, base: dict) -> dict:
    """A record as sweep.json lists it: no timings or worker names (they differ between runs);
    keys a scenario left at the base value are filled in from the base config."""
    given = record["values"]
    values = {k: given.get(k, base.get(k) if given else None) for k in columns}
    return {"sample": record["sample"], "status": record["status"], "values": values,
            "metrics": record["metrics"], "error": record["error"], "cautions": record.get("cautions", [])}


def _summary(samples: list, total: int) -> dict:
    ok = [s for s in samples if s["status"] == "ok"]
    metrics = [s["metrics"] for s in samples if s["metrics"]]
    ratios = [m["rms_ratio"] for m in metrics if m.get("rms_ratio") is not None]
    reached = [m["trials_to_strike"] for m in metrics if m.get("trials_to_strike") is not None]
    successes = sum(1 for s in samples if s["status"] == "ok" and s["metrics"] and s["metrics"]["success"])
    return {"samples": total, "done": len(samples), "ok": len(ok), "failed": len(samples) - len(ok),
            "success": successes, "success_rate": successes / len(samples) if samples else None,
            "median_rms_ratio": float(np.median(ratios)) if ratios else None,
            "median_trials_to_strike": float(np.median(reached)) if reached else None}


def write_outputs(out, spec: dict) -> dict:
    """``sweep.json``, ``samples.csv`` and the figures from the sample records in ``out``."""
    out = Path(out)
    records = [r for _, r in sorted(_finished(out, spec).items())]
    columns = _columns(spec, records)
    base = dict(_flat(_config.load(spec["base"]).values))
    samples = [_public(r, columns, base) for r in records]
    figures = {"success_by_key": "success_by_key.png", "rms_ratio": "rms_ratio.png",
               "trials_to_strike": "trials_to_strike.png"}
    data = {"sweep": spec["name"], "spec": spec["source"], "spec_digest": spec["digest"],
            "base_config": spec["base_source"], "base_config_hash": spec["base_hash"], "seed": spec["seed"],
            "job": {k: v for k, v in spec["job"].items() if k != "profile_table"},
            "varied": [{k: v for k, v in e.items()} for e in spec["vary"]] +
                      [{"key": k, "kind": _kind(k), "unit": _si_unit(_kind(k)), "distribution": spec["scenario"]}
                       for k in columns[len(spec["vary"]):]],
            "summary": _summary(samples, spec["samples"]),
            "definitions": DEFINITIONS, "samples": samples,
            "files": {"table": "samples.csv", **figures, "records": "samples/sample-NNNNNN.json"},
            "safety": safety.GENERAL + " " + safety.HARDWARE}
    table = samples_csv(samples, columns)
    write_text_atomic(out / "samples.csv", table)
    _figures(out, samples, columns, figures)
    write_json_atomic(out / "sweep.json", data)
    # the sweep's page: its table, the base config, the figures and the cautions
    rows = [line.split(",") for line in table.strip().splitlines() if not line.startswith("#")]
    failed = data["summary"].get("failed")
    write_report(out, f"sweep {spec['name']}", rows, config_text(_config.load(spec["base"])),
                 [safety.HARDWARE], "look into the failed samples first" if failed else
                 "check the plants nearest the edge of success on the rig, at reduced pressure first",
                 [out / name for name in figures.values()], notes=summary_lines(data))
    return json.loads((out / "sweep.json").read_text(encoding="utf-8"))


DEFINITIONS = {
    "values": "the sampled config values in SI units (m, kg, s, rad, Pa gauge), by key path",
    "success": "tune: the strike came within 0.2 deg and 1 % in some trial; compare: the learned profile's "
               "evaluation trial is within them without fault; run: every episode is, without fault",
    "model_only_rms_deg": "swing RMS error of the model-only feedforward (tune: trial 0; compare: its evaluation)",
    "learned_rms_deg": "swing RMS error of the last learning trial (compare: the learned profile's evaluation)",
    "rms_ratio": "learned_rms_deg / model_only_rms_deg",
    "rms_deg": "swing RMS error of the job's last trial (run: of the last episode)",
    "trials_to_strike": "index of the first trial with the strike within 0.2 deg and 1 % (trial 0 runs the "
                        "model-only profile); null when none is",
    "faults": "trials (episodes) that ended in an end-stop slam or a divergence",
    "cause": "the run's verdict cause (controllers.tuning.verdict)",
    "status": "failed: the sample's config was invalid, its job raised or a simulation diverged (see error)",
}


def _cell(value) -> str:
    if value is None:
        return ""
    if isinstance(value, float):
        return repr(value) if math.isfinite(value) else ""
    return str(value)


def samples_csv(samples: list, columns: list) -> str:
    """The table: one header line, one row per sample; values in SI with the unit in the header."""
    heads = ["sample", "status"] + [f"{k} [{_si_unit(_kind(k))}]" if _si_unit(_kind(k)) else k for k in columns]
    heads += list(METRICS) + ["error"]
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(heads)
    for s in samples:
        m = s["metrics"] or {}
        writer.writerow([s["sample"], s["status"]] + [_cell(s["values"].get(k)) for k in columns]
                        + [_cell(m.get(k)) for k in METRICS] + [_cell(s["error"])])
    return buf.getvalue()


def _succeeded(sample) -> bool:
    return sample["status"] == "ok" and bool(sample["metrics"]) and bool(sample["metrics"]["success"])


def plot_success_by_key(samples: list, key: str, unit: str, ax):
    """Success rate of the samples against the values of ``key`` (per value, or in up to six bins
    of equal width); returns the bar artists."""
    pairs = [(s["values"].get(key), _succeeded(s)) for s in samples if s["values"].get(key) is not None]
    numeric = all(isinstance(v, (int, float)) and not isinstance(v, bool) for v, _ in pairs)
    if not pairs:
        ax.text(0.5, 0.5, "no samples", ha="center", va="center", transform=ax.transAxes)
        return []
    distinct = sorted({v for v, _ in pairs}, key=str if not numeric else float)
    if numeric and len(distinct) > 6:
        edges = np.linspace(min(distinct), max(distinct), 7)
        where = np.clip(np.searchsorted(edges, [v for v, _ in pairs], side="right") - 1, 0, 5)
        groups = [[ok for (v, ok), w in zip(pairs, where) if w == b] for b in range(6)]
        centres, width = 0.5 * (edges[1:] + edges[:-1]), 0.9 * (edges[1] - edges[0])
        labels = None
    else:
        groups = [[ok for v, ok in pairs if v == d] for d in distinct]
        centres, width, labels = np.arange(len(distinct)), 0.8, [f"{d:.4g}" if numeric else str(d) for d in distinct]
    rates = [sum(g) / len(g) if g else 0.0 for g in groups]
    bars = ax.bar(centres, rates, width=width, color="tab:green", alpha=0.8)
    for x, g, r in zip(centres, groups, rates):
        if g:
            ax.text(x, r + 0.02, f"{sum(g)}/{len(g)}", ha="center", va="bottom", fontsize="x-small")
    if labels is not None:
        ax.set_xticks(centres, labels, fontsize="small", rotation=30 if len(labels) > 4 else 0)
    ax.set_ylim(0, 1.15)
    ax.set_xlabel(f"{key} [{unit}]" if unit else key, fontsize="small")
    ax.set_ylabel("success rate")
    return list(bars)


def plot_rms_ratio(samples: list, ax):
    """Distribution of the learned / model-only RMS ratio (logarithmic bins); returns the patches."""
    ratios = [s["metrics"]["rms_ratio"] for s in samples if s["metrics"] and s["metrics"].get("rms_ratio")]
    if not ratios:
        ax.text(0.5, 0.5, "no learned / model-only ratios (job without learning)", ha="center", va="center",
                transform=ax.transAxes)
        return []
    low, high = min(ratios), max(ratios)
    bins = np.geomspace(low / 1.1, high * 1.1, min(20, max(3, len(ratios))) + 1)
    _, _, patches = ax.hist(ratios, bins=bins, color="tab:blue", alpha=0.8)
    ax.set_xscale("log")
    ax.axvline(float(np.median(ratios)), color="k", lw=1, ls="--", label=f"median {np.median(ratios):.3g}")
    ax.set_xlabel("learned RMS / model-only RMS")
    ax.set_ylabel("samples")
    ax.legend(fontsize="small")
    return list(patches)


def plot_trials_to_strike(samples: list, ax):
    """How many samples first met the strike in each trial, and how many never did."""
    metrics = [s["metrics"] for s in samples if s["metrics"] and s["metrics"].get("trials") is not None]
    reached = [m["trials_to_strike"] for m in metrics if m.get("trials_to_strike") is not None]
    missed = len(metrics) - len(reached)
    top = max(reached, default=0)
    counts = [reached.count(k) for k in range(top + 1)]
    bars = list(ax.bar(np.arange(top + 1), counts, color="tab:blue", alpha=0.8, label="strike met"))
    bars += list(ax.bar([top + 1.5], [missed], color="tab:red", alpha=0.8, label="not met"))
    ax.set_xticks(list(range(top + 1)) + [top + 1.5], [str(k) for k in range(top + 1)] + ["none"], fontsize="small")
    ax.set_xlabel("first trial with the strike within 0.2 deg and 1 %")
    ax.set_ylabel("samples")
    ax.legend(fontsize="small")
    return bars


def _figures(out: Path, samples: list, columns: list, names: dict) -> None:
    """The three figures (matplotlib's object API: no pyplot state)."""
    from matplotlib.figure import Figure

    n = max(len(columns), 1)
    cols = min(n, 3)
    rows = math.ceil(n / cols)
    fig = Figure(figsize=(4.2 * cols, 3.2 * rows + 0.5), layout="constrained")
    axes = np.atleast_1d(fig.subplots(rows, cols, squeeze=False)).ravel()
    for ax, key in zip(axes, columns):
        plot_success_by_key(samples, key, _si_unit(_kind(key)), ax)
    for ax in axes[len(columns):]:
        ax.set_axis_off()
    if not columns:
        axes[0].text(0.5, 0.5, "no varied keys", ha="center", va="center", transform=axes[0].transAxes)
    fig.suptitle("success rate against each varied key (count on each bar)", fontsize="small")
    save_figure_atomic(fig, out / names["success_by_key"])
    for name, draw in (("rms_ratio", plot_rms_ratio), ("trials_to_strike", plot_trials_to_strike)):
        fig = Figure(figsize=(6.5, 4), layout="constrained")
        draw(samples, fig.subplots())
        save_figure_atomic(fig, out / names[name])


def summary_lines(data: dict) -> list:
    """What `pamjoint sweep` prints at the end."""
    s = data["summary"]
    lines = [f"{s['done']} of {s['samples']} samples done: {s['ok']} ok, {s['failed']} failed; success "
             f"{s['success']} of {s['done']}" + (f" ({100 * s['success_rate']:.0f} %)" if s["success_rate"] is not None
                                                 else "")]
    if s["median_rms_ratio"] is not None:
        lines.append(f"median learned / model-only RMS {s['median_rms_ratio']:.3g}")
    if s["median_trials_to_strike"] is not None:
        lines.append(f"median first trial on the strike {s['median_trials_to_strike']:g} (of those that met it)")
    for sample in data["samples"]:
        if sample["status"] != "ok":
            lines.append(f"  sample {sample['sample']} failed: {sample['error']}")
    return lines

