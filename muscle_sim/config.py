"""YAML config -> validated SI values and parameter objects; the only place units are converted.

A config is a nested mapping. Every key is declared in :data:`SCHEMA` with its kind of quantity
(units as in :mod:`muscle_sim.units`), default, allowed range and meaning; unknown keys are
errors with a did-you-mean. Every error is one line: key path, value, what is allowed.
"""
from __future__ import annotations

import copy
import difflib
import hashlib
import json
import math
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any, Mapping

from .errors import ConfigError, ParameterError
from .params import JointParams, McKibbenParams, PlantParams, PneumaticParams
from .plant import holding_pressures
from .pneumatics import tube_delay, tube_volume
from .units import UNITS, UnitError, allowed_units, to_si
from .yaml_input import parse_yaml_bytes

_REQUIRED = object()


@dataclass(frozen=True)
class Key:
    """Declaration of one config key.

    ``kind`` is a quantity kind of :data:`~muscle_sim.units.UNITS`, or ``"int"``, ``"bool"``,
    ``"str"``; ``many=True`` means a list of such values. ``low``/``high`` bound the SI value.
    """

    kind: str
    doc: str
    default: Any = _REQUIRED
    low: float | None = None
    high: float | None = None
    low_open: bool = False
    high_open: bool = False
    choices: tuple = ()
    many: bool = False
    unit: str | None = None  # unit used to show this key's value back to people


def _section(**keys) -> dict:
    return keys


MUSCLE_KEYS = _section(
    rest_length=Key("length", "active length at zero pressure and zero contraction", low=0, low_open=True,
                    unit="mm"),
    rest_radius=Key("length", "braid radius at rest (bladder wall inside it)", low=0, low_open=True, unit="mm"),
    rest_braid_angle=Key("angle", "braid angle from the long axis at rest; below 54.7356 deg", low=0,
                         high=math.acos(1 / math.sqrt(3)), low_open=True, high_open=True, unit="deg"),
    wall_thickness=Key("length", "bladder wall thickness (thick-wall correction)", default=0.0, low=0,
                       unit="mm"),
    end_correction=Key("dimensionless", "end-effect factor k >= 1 (contraction acts as k eps)", default=1.0,
                       low=1.0, high=10.0),
    rated_pressure=Key("pressure", "highest gauge pressure the muscle is rated for", low=0, low_open=True,
                       unit="bar"),
    threshold_pressure=Key("pressure", "gauge pressure the bladder takes before the braid pulls",
                           default=0.0, low=0, unit="bar"),
    braid_friction=Key("dimensionless", "braid friction as a fraction of pi r0^2 P", default=0.0, low=0,
                       high=1.0),
    friction_rate_scale=Key("rate", "contraction rate that smooths the friction sign", default=0.05, low=0,
                            low_open=True),
    friction_model=Key("str", "braid friction law: tanh (smoothed Coulomb) or maxwell-slip (hysteresis "
                       "elements); the prior always uses tanh", default="tanh", choices=("tanh", "maxwell-slip")),
    friction_elements=Key("int", "number of Maxwell-slip elements", default=8, low=1, high=64),
    slip_length=Key("length", "braid stretch after which the full Maxwell-slip friction has developed",
                    default=1e-3, low=0, low_open=True, unit="mm"),
    force_scale=Key("dimensionless", "multiplier on the plant muscle's pulling force (1: the model as written; "
                    "below 1 the muscle pulls weaker than the law; the prior keeps 1 unless prior.force_scale)",
                    default=1.0, low=0.05, high=20.0),
)

MUSCLE_MAP_KEYS = _section(
    pressures=Key("pressure", "gauge pressures of the single-muscle force table of `pamjoint joint`", many=True,
                  low=0, default=None, unit="bar"),
    contraction_step=Key("dimensionless", "contraction step of the force table", default=0.025, low=0,
                         high=0.2, low_open=True),
    usable_fraction=Key("dimensionless", "share of the maximum contraction counted as usable",
                        default=0.8, low=0, high=1.0, low_open=True),
)

_POS = dict(low=0, low_open=True)
_NONNEG = dict(low=0)

JOINT_KEYS = _section(
    pulley_radius=Key("length", "radius the muscle cables wind on", unit="mm", **_POS),
    pre_contraction=Key("dimensionless", "contraction of both muscles at 0 deg", low=0, high=0.5),
    paddle_inertia=Key("inertia", "inertia of the paddle about the pivot", **_POS),
    paddle_mass=Key("mass", "mass of the paddle", default=0.0, **_NONNEG),
    center_of_mass=Key("length", "distance of the paddle's centre of mass from the pivot", default=0.0,
                       unit="mm", **_NONNEG),
    payload_mass=Key("mass", "payload riding on the paddle (the prior model may not know it)", default=0.0,
                     **_NONNEG),
    payload_radius=Key("length", "distance of the payload from the pivot", default=0.0, unit="mm", **_NONNEG),
    hanging_angle=Key("angle", "joint angle at which the paddle hangs straight down; null for a "
                      "horizontal swing plane (no gravity)", default=None, low=-math.pi, high=math.pi, unit="deg"),
    viscous_damping=Key("rotational_damping", "viscous friction at the pivot", default=0.0, **_NONNEG),
    coulomb_torque=Key("torque", "dry friction level at the pivot", default=0.0, **_NONNEG),
    coulomb_rate_scale=Key("angular_velocity", "rate that smooths the dry friction sign", default=0.05, **_POS,
                           unit="rad/s"),
    lower_stop=Key("angle", "where the lower end stop begins", low=-math.pi, high=0, unit="deg"),
    upper_stop=Key("angle", "where the upper end stop begins", low=0, high=math.pi, unit="deg"),
    stop_stiffness=Key("rotational_stiffness", "end-stop spring rate", default=2000.0, **_NONNEG),
    stop_damping=Key("dimensionless", "Hunt-Crossley stop damping per rad of penetration [N m s/rad^2]",
                     default=50.0, **_NONNEG),
)

PNEUMATIC_KEYS = _section(
    supply_pressure=Key("pressure", "gauge supply pressure", unit="bar", **_POS),
    allow_supply_above_rated=Key("bool", "accept a supply above the muscles' rated pressure (every output "
                                 "then carries a caution)", default=False),
    atmosphere=Key("pressure", "ABSOLUTE ambient pressure", default=101325.0, unit="kPa", **_POS),
    temperature=Key("temperature", "air temperature", default=293.15, **_POS),
    model=Key("str", "valve (ISO 6358 flow through proportional valves) or lag (first-order regulator)",
              default="valve", choices=("valve", "lag")),
    sonic_conductance=Key("sonic_conductance", "ISO 6358 sonic conductance C of each valve", default=1.5e-8,
                          unit="dm^3/(s bar)", **_POS),
    critical_ratio=Key("dimensionless", "ISO 6358 critical pressure ratio b", default=0.3, low=0, high=0.99),
    subsonic_index=Key("dimensionless", "ISO 6358-1:2013 subsonic index m", default=0.5, low=0.1, high=1.0),
    valve_time_constant=Key("time", "spool time constant of the proportional valve", default=0.002, unit="ms",
                            **_POS),
    valve_gain=Key("dimensionless", "inner pressure loop: spool opening per bar of pressure error",
                   default=4.0, **_POS),
    valve_dead_time=Key("time", "dead time of the valve electronics", default=0.0, unit="ms", **_NONNEG),
    tube_length=Key("length", "tube length from valve to muscle", default=0.0, unit="m", **_NONNEG),
    tube_bore=Key("length", "tube inner diameter", default=0.004, unit="mm", **_POS),
    fitting_volume=Key("volume", "dead volume of fittings and muscle end caps", default=0.0, unit="cm^3",
                       **_NONNEG),
    lag_time_constant=Key("time", "time constant of the lag model", default=0.02, unit="ms", **_POS),
    max_pressure_rate=Key("pressure_rate", "rate limit of the lag model (null: none)", default=None,
                          unit="bar/s", **_POS),
)

SENSOR_KEYS = _section(
    angle_counts=Key("int", "encoder counts per revolution (0: no quantisation)", default=0, low=0),
    angle_noise=Key("angle", "standard deviation of the angle noise", default=0.0, unit="deg", **_NONNEG),
    rate_noise=Key("angular_velocity", "standard deviation of the rate noise", default=0.0, unit="deg/s",
                   **_NONNEG),
    pressure_noise=Key("pressure", "standard deviation of the pressure sensor noise", default=0.0,
                       unit="kPa", **_NONNEG),
    pressure_lag=Key("time", "time constant of the pressure sensors", default=0.0, unit="ms", **_NONNEG),
)

DRIFT_KEYS = _section(
    friction_growth=Key("dimensionless", "relative growth of braid and pivot friction per trial",
                        default=0.0, low=-0.5, high=0.5),
    supply_sag=Key("pressure", "drop of the supply pressure per trial", default=0.0, unit="bar", **_NONNEG),
    supply_floor=Key("pressure", "the supply never sags below this", default=0.0, unit="bar", **_NONNEG),
    spread=Key("dimensionless", "random relative spread of friction and supply per trial (seeded)",
               default=0.0, low=0, high=0.2),
)

PRIOR_KEYS = _section(
    payload_mass=Key("mass", "payload mass the prior assumes (null: the plant's if payload_known, else none)",
                     default=None, **_NONNEG),
    payload_radius=Key("length", "where the prior's payload rides from the pivot (null: the plant's)",
                       default=None, unit="mm", **_NONNEG),
    muscle_model=Key("str", "ideal (no wall, no end effect, no friction) or plant (the plant's muscle, "
                     "its braid friction as the tanh law)",
                     default="ideal", choices=("ideal", "plant")),
    viscous_damping=Key("rotational_damping", "pivot viscous friction the prior assumes (null: the plant's if "
                        "pivot_friction, else none)", default=None, **_NONNEG),
    coulomb_torque=Key("torque", "pivot dry friction the prior assumes (null: the plant's if pivot_friction, "
                       "else none)", default=None, **_NONNEG),
    force_scale=Key("dimensionless", "multiplier on the prior's muscle force (null: 1, the model as written)",
                    default=None, low=0.05, high=20.0),
    end_correction=Key("dimensionless", "end correction the prior assumes (null: that of muscle_model)",
                       default=None, low=1.0, high=10.0),
    payload_known=Key("bool", "whether the prior knows the payload", default=False),
    inertia_error=Key("dimensionless", "relative error of the prior's paddle inertia", default=0.0,
                      low=-0.9, high=10.0),
    pivot_friction=Key("bool", "whether the prior models the pivot friction", default=False),
    pressure_model=Key("str", "lag (first-order regulator) or valve (the plant's valves)", default="lag",
                       choices=("lag", "valve")),
    pressure_time_constant=Key("time", "time constant of the prior's pressure lag", default=0.02, unit="ms",
                               **_POS),
    pressure_delay=Key("time", "command delay the prior assumes (null: the plant's)", default=None, unit="ms",
                       **_NONNEG),
    sonic_conductance=Key("sonic_conductance", "ISO 6358 sonic conductance C of the valves a valve-flow prior "
                          "assumes (null: plant.pneumatics.sonic_conductance)", default=None,
                          unit="dm^3/(s bar)", **_POS),
)

TASK_KEYS = _section(
    home_angle=Key("angle", "rest angle before and after the strike", unit="deg", low=-math.pi, high=math.pi),
    strike_angle=Key("angle", "angle at the strike instant", unit="deg", low=-math.pi, high=math.pi),
    strike_time=Key("time", "strike instant from the start of the trial", unit="ms", **_POS),
    strike_speed=Key("angular_velocity", "angular speed at the strike instant", unit="rad/s", **_POS),
    follow_through=Key("angle", "travel past the strike angle before the swing turns back", unit="deg",
                       **_POS),
    return_time=Key("time", "when the reference is back at the home angle", unit="ms", **_POS),
    settle_time=Key("time", "by when the paddle must have settled at home", unit="ms", **_POS),
    settle_tolerance=Key("angle", "band around home that counts as settled", default=math.radians(1.0),
                         unit="deg", **_POS),
    trial_length=Key("time", "length of one trial (episode), at most a minute", unit="ms", low=0, low_open=True,
                     high=60.0),
    control_rate=Key("frequency", "control (and sampling) rate, 10 Hz to 20 kHz", default=500.0, unit="Hz",
                     low=10.0, high=20000.0),
    n_substeps=Key("int", "RK4 physics sub-steps per control step", default=2, low=1, high=1000),
    home_pressure=Key("pressure", "co-contraction: the weaker muscle's pressure holding home", default=2e5,
                      unit="bar", low=0),
    fault_depth=Key("angle", "penetration into an end stop that ends a trial as a hard fault",
                    default=math.radians(3.0), unit="deg", **_POS),
)

LEARNING_KEYS = _section(
    method=Key("str", "update rule of the learner", default="norm-optimal",
               choices=("norm-optimal", "gradient", "spsa")),
    trials=Key("int", "trials of `pamjoint tune` unless --trials is given", default=12, low=1, high=100000),
    knot_spacing=Key("time", "spacing of the profile's knots (coarser = smoother updates)", default=0.008,
                     unit="ms", **_POS),
    strike_weight=Key("dimensionless", "extra weight of the angle error inside the strike window", default=20.0,
                      **_NONNEG),
    strike_window=Key("time", "half width of the strike window", default=0.02, unit="ms", **_NONNEG),
    speed_weight=Key("angle", "angle error in the strike window that weighs as much as 1 % strike speed error",
                     default=math.radians(0.1), unit="deg", **_NONNEG),
    regularisation=Key("dimensionless", "norm-optimal change penalty S relative to the mean curvature",
                       default=0.05, **_NONNEG),
    guard_factor=Key("dimensionless", "reject an update whose trial cost exceeds the best so far by this factor",
                     default=2.0, low=1.0, low_open=True),
    guard_floor=Key("angle", "swing error below which no trial counts as diverged (noise and drift move small "
                    "costs by large factors)", default=math.radians(0.5), unit="deg", **_NONNEG),
    angle_margin=Key("angle", "keep the swing this far inside the end stops", default=math.radians(3.0),
                     unit="deg", **_NONNEG),
    min_pressure=Key("pressure", "lowest pressure command the learner may give", default=0.0, unit="bar", low=0),
    max_pressure=Key("pressure", "highest pressure command (null: the rated pressure)", default=None, unit="bar",
                     **_POS),
    update_prior=Key("bool", "re-identify the prior from each trial and linearise the updated prior", default=True),
    prior_blend=Key("dimensionless", "share of the way to a new identified value the prior moves per trial",
                    default=0.5, low=0.0, high=1.0, low_open=True),
    pressure_law=Key("str", "select (the first trial's logs choose the prior's pressure law, regulator lag or the "
                     "config's valve flow, by which fits them clearly better) or keep (prior.pressure_model as set)",
                     default="keep", choices=("select", "keep")),
    spsa_step=Key("pressure", "SPSA: size of the first update", default=2e4, unit="kPa", **_POS),
    spsa_perturbation=Key("pressure", "SPSA: perturbation c of the first trials", default=1e4, unit="kPa", **_POS),
)

FEEDBACK_KEYS = _section(
    proportional=Key("pressure_per_angle", "PID proportional gain, differential pressure per angle error "
                     "(null: placed on the prior)", default=None, unit="bar/deg", **_NONNEG),
    integral=Key("pressure_per_angle_time", "PID integral gain (null: placed on the prior)", default=None,
                 unit="bar/(deg s)", **_NONNEG),
    derivative=Key("pressure_time_per_angle", "PID derivative gain on the rate error (null: placed on the prior)",
                   default=None, unit="bar s/deg", **_NONNEG),
    phase_margin=Key("angle", "phase margin the placed gains keep on the prior, pressure lag and delay included",
                     default=math.radians(30.0), unit="deg", low=0, high=math.pi / 2, low_open=True, high_open=True),
    gain_margin=Key("dimensionless", "gain margin the placed gains keep on the prior (factor on the loop gain)",
                    default=2.0, low=1.0, high=20.0, low_open=True),
)

#: Declared layout of a pamjoint config (every key, its quantity, default, range and meaning).
SCHEMA: dict = {
    "name": Key("str", "a short name for the setup", default=""),
    "description": Key("str", "free text about the setup", default=""),
    "plant": {"muscle": MUSCLE_KEYS, "joint": JOINT_KEYS, "pneumatics": PNEUMATIC_KEYS,
              "sensors": SENSOR_KEYS, "drift": DRIFT_KEYS},
    "prior": PRIOR_KEYS,
    "task": TASK_KEYS,
    "learning": LEARNING_KEYS,
    "feedback": FEEDBACK_KEYS,
    "muscle_map": MUSCLE_MAP_KEYS,
}


@dataclass(frozen=True)
class Config:
    """A validated config: the SI values by key path, where it came from and a content hash."""

    values: dict
    source: str
    digest: str

    def get(self, dotted: str):
        """Value at a dotted key path, e.g. ``"plant.muscle.rest_length"`` (SI)."""
        node: Any = self.values
        for part in dotted.split("."):
            node = node[part]
        return node


def _fmt(value) -> str:
    return repr(value) if not isinstance(value, str) else f"'{value}'"


def _range_text(key: Key) -> str:
    unit = key.unit or (next(iter(UNITS[key.kind])) if key.kind in UNITS else "")
    factor = UNITS[key.kind][unit] if key.kind in UNITS else 1.0
    parts = []
    if key.low is not None:
        parts.append(f"{'>' if key.low_open else '>='} {key.low / factor:g} {unit}".rstrip())
    if key.high is not None:
        parts.append(f"{'<' if key.high_open else '<='} {key.high / factor:g} {unit}".rstrip())
    return " and ".join(parts)


def _convert_one(path: str, key: Key, value):
    if key.kind == "str":
        if not isinstance(value, str):
            raise ConfigError(f"{path}: {_fmt(value)} is not allowed; must be text")
        out = value
    elif key.kind == "bool":
        if not isinstance(value, bool):
            raise ConfigError(f"{path}: {_fmt(value)} is not allowed; must be true or false")
        out = value
    elif key.kind == "int":
        if isinstance(value, bool) or not isinstance(value, int):
            raise ConfigError(f"{path}: {_fmt(value)} is not allowed; must be a whole number")
        out = value
    else:
        try:
            out = to_si(value, key.kind)
        except UnitError as exc:
            raise ConfigError(f"{path}: {exc}") from None
    if key.choices and out not in key.choices:
        raise ConfigError(f"{path}: {_fmt(value)} is not allowed; must be one of "
                          + ", ".join(map(str, key.choices)))
    if isinstance(out, (int, float)) and not isinstance(out, bool):
        bad = (key.low is not None and (out < key.low or (key.low_open and out == key.low))) or \
              (key.high is not None and (out > key.high or (key.high_open and out == key.high)))
        if bad:
            raise ConfigError(f"{path}: {_fmt(value)} is not allowed; must be {_range_text(key)}")
    return out


def _convert(path: str, key: Key, value):
    if value is None and key.default is None:
        return None
    if key.many:
        if not isinstance(value, list) or not value:
            raise ConfigError(f"{path}: {_fmt(value)} is not allowed; must be a non-empty list, "
                              f"e.g. ['1 bar', '2 bar']")
        return [_convert_one(f"{path}[{i}]", key, v) for i, v in enumerate(value)]
    return _convert_one(path, key, value)


def _resolve(schema: dict, raw: Any, path: str) -> dict:
    if raw is None:
        raw = {}
    if not isinstance(raw, Mapping):
        raise ConfigError(f"{path or 'config'}: {_fmt(raw)} is not allowed; must be a mapping of keys")
    for name in raw:
        if name not in schema:
            where = f"{path}.{name}" if path else str(name)
            close = difflib.get_close_matches(str(name), list(schema), n=1)
            hint = f"; did you mean '{close[0]}'?" if close else f"; allowed: {', '.join(schema)}"
            raise ConfigError(f"{where}: unknown key{hint}")
    out = {}
    for name, spec in schema.items():
        where = f"{path}.{name}" if path else name
        if isinstance(spec, dict):
            out[name] = _resolve(spec, raw.get(name), where)
        elif name in raw:
            out[name] = _convert(where, spec, raw[name])
        elif spec.default is _REQUIRED:
            unit = f" (units: {allowed_units(spec.kind)})" if spec.kind in UNITS else ""
            raise ConfigError(f"{where}: missing; required: {spec.doc}{unit}")
        else:
            out[name] = copy.deepcopy(spec.default)
    return out


def shipped_config(name: str = "flipper.yaml") -> Path:
    """Path of a config shipped with pamjoint: the installed package data
    (``muscle_sim/demo_configs``), else the source tree's ``configs/`` folder."""
    here = Path(__file__).resolve().parent
    for folder in (here / "demo_configs", here.parent / "configs"):
        if (folder / name).is_file():
            return folder / name
    return here.parent / "configs" / name


def load(source) -> Config:
    """Read and validate a config from a YAML path or an already-parsed mapping."""
    if isinstance(source, (str, Path)):
        path = Path(source)
        try:
            data = path.read_bytes()
        except OSError as exc:
            raise ConfigError(f"config: cannot read {str(path)!r}: {exc.strerror or exc}") from None
        raw = parse_yaml_bytes(data, f"config {str(path)!r}")
        name = str(path)
    elif isinstance(source, Mapping):
        raw, name = copy.deepcopy(dict(source)), "<mapping>"
    else:
        raise ConfigError(f"config: {type(source).__name__} is not allowed; must be a path or a mapping")
    values = _resolve(SCHEMA, raw, "")
    digest = hashlib.sha256(json.dumps(values, sort_keys=True, default=str).encode()).hexdigest()[:16]
    cfg = Config(values=values, source=name, digest=digest)
    _check_cross(cfg)
    return cfg


def _check_cross(cfg: Config) -> None:
    """Checks that involve more than one key (each still reported on one line)."""
    muscle = muscle_params(cfg)
    pn = cfg.get("plant.pneumatics")
    if pn["supply_pressure"] > muscle.rated_pressure and not pn["allow_supply_above_rated"]:
        raise ConfigError(
            f"plant.pneumatics.supply_pressure: {pn['supply_pressure'] / 1e5:g} bar is not allowed; must be "
            f"<= plant.muscle.rated_pressure {muscle.rated_pressure / 1e5:g} bar (set "
            f"plant.pneumatics.allow_supply_above_rated: true to analyse it anyway)")
    joint = cfg.get("plant.joint")
    task = cfg.get("task")
    for name in ("home_angle", "strike_angle"):
        if not joint["lower_stop"] < task[name] < joint["upper_stop"]:
            raise ConfigError(f"task.{name}: {math.degrees(task[name]):g} deg is not allowed; must lie between "
                              f"the end stops {math.degrees(joint['lower_stop']):g} and "
                              f"{math.degrees(joint['upper_stop']):g} deg")
    peak = task["strike_angle"] + task["follow_through"]
    if peak >= joint["upper_stop"]:
        raise ConfigError(f"task.follow_through: {math.degrees(task['follow_through']):g} deg is not allowed; "
                          f"strike angle plus follow-through must stay below the upper stop "
                          f"{math.degrees(joint['upper_stop']):g} deg")
    if task["strike_angle"] <= task["home_angle"]:
        raise ConfigError(f"task.strike_angle: {math.degrees(task['strike_angle']):g} deg is not allowed; "
                          f"must be above task.home_angle {math.degrees(task['home_angle']):g} deg")
    order = [("strike_time", task["strike_time"]), ("return_time", task["return_time"]),
             ("settle_time", task["settle_time"]), ("trial_length", task["trial_length"])]
    for (a, va), (b, vb) in zip(order, order[1:]):
        if vb < va:
            raise ConfigError(f"task.{b}: {vb * 1e3:g} ms is not allowed; must be >= task.{a} {va * 1e3:g} ms")
    steps = task["trial_length"] * task["control_rate"]
    if abs(steps - round(steps)) > 1e-6 or abs(task["strike_time"] * task["control_rate"]
                                                - round(task["strike_time"] * task["control_rate"])) > 1e-6:
        raise ConfigError(f"task.control_rate: {task['control_rate']:g} Hz is not allowed; trial_length and "
                          f"strike_time must be whole numbers of control steps")
    learn = cfg.get("learning")
    if learn["max_pressure"] is not None and learn["max_pressure"] > muscle.rated_pressure:
        raise ConfigError(f"learning.max_pressure: {learn['max_pressure'] / 1e5:g} bar is not allowed; must be <= "
                          f"plant.muscle.rated_pressure {muscle.rated_pressure / 1e5:g} bar")
    if learn["max_pressure"] is not None and learn["min_pressure"] >= learn["max_pressure"]:
        raise ConfigError(f"learning.min_pressure: {learn['min_pressure'] / 1e5:g} bar is not allowed; must be < "
                          f"learning.max_pressure {learn['max_pressure'] / 1e5:g} bar")
    for section, params in (("plant", plant_params(cfg)), ("prior", prior_params(cfg))):
        _check_home_hold(task, params, section, muscle.rated_pressure)
    sensor_params(cfg)
    drift_params(cfg)
    strike_task(cfg)


def _check_home_hold(task: dict, params: PlantParams, section: str, rated: float) -> None:
    """The pressures that hold home (the trial's start) lie within the supply and the rating."""
    top = min(params.pneumatics.supply_pressure, rated)

    def hold(base):
        return holding_pressures(params, task["home_angle"], base)

    try:
        pa, pb = hold(task["home_pressure"])
    except ValueError:
        raise ConfigError(f"task.home_angle: {math.degrees(task['home_angle']):g} deg is not allowed; the "
                          f"{section}'s muscles cannot hold it (one is slack or fully contracted)") from None
    if max(pa, pb) <= top:
        return
    low, high = 0.0, task["home_pressure"]           # the largest co-contraction that fits (bisection)
    for _ in range(50):
        mid = 0.5 * (low + high)
        low, high = (mid, high) if max(hold(mid)) <= top else (low, mid)
    fits = f"must be at most {math.floor(low / 1e3) / 100:g} bar" if max(hold(0.0)) <= top else \
        "no co-contraction fits: the home angle needs more than the supply"
    raise ConfigError(f"task.home_pressure: {task['home_pressure'] / 1e5:g} bar is not allowed; holding "
                      f"task.home_angle {math.degrees(task['home_angle']):g} deg on the {section} then needs "
                      f"muscle A {pa / 1e5:.3g} bar and muscle B {pb / 1e5:.3g} bar, above the supply or rating "
                      f"{top / 1e5:g} bar; {fits}")


def muscle_params(cfg: Config, section: str = "plant.muscle") -> McKibbenParams:
    """Build :class:`McKibbenParams` from a config section; errors carry the key path."""
    return _build(McKibbenParams, cfg.get(section), section)


def _build(cls, values: dict, section: str, rename: dict | None = None):
    try:
        return cls(**values)
    except ParameterError as exc:
        text = str(exc)
        field = text.split(":", 1)[0].split(".", 1)[-1]
        field = (rename or {}).get(field, field)
        raise ConfigError(f"{section}.{field}:{text.split(':', 1)[1]}") from None


_GRAVITY = 9.80665  # standard gravity [m/s^2] (CGPM 1901)


def joint_params(cfg: Config, payload: bool = True, inertia_error: float = 0.0,
                 pivot_friction: bool = True, payload_mass: float | None = None,
                 payload_radius: float | None = None, viscous_damping: float | None = None,
                 coulomb_torque: float | None = None) -> JointParams:
    """Build :class:`JointParams` from ``plant.joint`` (optionally as a prior model sees it).

    ``payload`` and ``pivot_friction`` take the plant's payload and pivot friction or none; a
    given ``payload_mass``, ``payload_radius``, ``viscous_damping`` or ``coulomb_torque`` (SI)
    replaces the plant's value instead."""
    j = cfg.get("plant.joint")
    m_pay = payload_mass if payload_mass is not None else (j["payload_mass"] if payload else 0.0)
    r_pay = j["payload_radius"] if payload_radius is None else payload_radius
    moment = (j["paddle_mass"] * j["center_of_mass"] + m_pay * r_pay) * _GRAVITY
    hanging = j["hanging_angle"]
    values = dict(
        pulley_radius=j["pulley_radius"], pre_contraction=j["pre_contraction"],
        inertia=j["paddle_inertia"] * (1.0 + inertia_error), payload_inertia=m_pay * r_pay ** 2,
        gravity_moment=0.0 if hanging is None else moment,
        gravity_offset=0.0 if hanging is None else -hanging,
        viscous_damping=viscous_damping if viscous_damping is not None else (
            j["viscous_damping"] if pivot_friction else 0.0),
        coulomb_torque=coulomb_torque if coulomb_torque is not None else (
            j["coulomb_torque"] if pivot_friction else 0.0),
        coulomb_rate_scale=j["coulomb_rate_scale"], lower_stop=j["lower_stop"], upper_stop=j["upper_stop"],
        stop_stiffness=j["stop_stiffness"], stop_damping=j["stop_damping"])
    return _build(JointParams, values, "plant.joint", {"inertia": "paddle_inertia"})


def pneumatic_params(cfg: Config, model: str | None = None, lag_time_constant: float | None = None,
                     delay: float | None = None, sonic_conductance: float | None = None) -> PneumaticParams:
    """Build :class:`PneumaticParams` from ``plant.pneumatics`` (tube -> dead volume and delay)."""
    pn = cfg.get("plant.pneumatics")
    plant_delay = tube_delay(pn["tube_length"], pn["temperature"]) + pn["valve_dead_time"]
    values = dict(
        supply_pressure=pn["supply_pressure"], model=model or pn["model"], atmosphere=pn["atmosphere"],
        temperature=pn["temperature"], sonic_conductance=pn["sonic_conductance"] if sonic_conductance is None else sonic_conductance,
        critical_ratio=pn["critical_ratio"], subsonic_index=pn["subsonic_index"],
        valve_time_constant=pn["valve_time_constant"], valve_gain=pn["valve_gain"],
        dead_volume=tube_volume(pn["tube_length"], pn["tube_bore"]) + pn["fitting_volume"],
        delay=plant_delay if delay is None else delay,
        lag_time_constant=pn["lag_time_constant"] if lag_time_constant is None else lag_time_constant,
        max_pressure_rate=math.inf if pn["max_pressure_rate"] is None else pn["max_pressure_rate"])
    return _build(PneumaticParams, values, "plant.pneumatics")


def plant_params(cfg: Config) -> PlantParams:
    """The simulated truth: every effect the config describes."""
    return _build_plant(muscle_params(cfg), joint_params(cfg), pneumatic_params(cfg))


def prior_params(cfg: Config) -> PlantParams:
    """The model the controllers believe, derived from ``plant`` by the ``prior`` section."""
    pr = cfg.get("prior")
    muscle = muscle_params(cfg)
    # the prior never models braid hysteresis: a plant's Maxwell-slip friction becomes the tanh law;
    # nor the plant's force-model error: its force scale is prior.force_scale or 1 (the law as written)
    muscle = replace(muscle, friction_model="tanh", force_scale=1.0)
    if pr["muscle_model"] == "ideal":
        muscle = replace(muscle, wall_thickness=0.0, end_correction=1.0, threshold_pressure=0.0,
                         braid_friction=0.0)
    if pr["end_correction"] is not None:
        muscle = _build(McKibbenParams, {**muscle.__dict__, "end_correction": pr["end_correction"]},
                        "prior")
    if pr["force_scale"] is not None:
        muscle = _build(McKibbenParams, {**muscle.__dict__, "force_scale": pr["force_scale"]}, "prior")
    joint = joint_params(cfg, payload=pr["payload_known"], inertia_error=pr["inertia_error"],
                         pivot_friction=pr["pivot_friction"], payload_mass=pr["payload_mass"],
                         payload_radius=pr["payload_radius"], viscous_damping=pr["viscous_damping"],
                         coulomb_torque=pr["coulomb_torque"])
    pneu = pneumatic_params(cfg, model=pr["pressure_model"], lag_time_constant=pr["pressure_time_constant"],
                            delay=pr["pressure_delay"], sonic_conductance=pr["sonic_conductance"])
    return _build_plant(muscle, joint, pneu, "prior")


def _build_plant(muscle, joint, pneumatics, section: str = "plant.joint") -> PlantParams:
    try:
        return PlantParams(muscle, joint, pneumatics)
    except ParameterError as exc:
        text = str(exc)
        field = text.split(":", 1)[0].split(".", 1)[-1]
        raise ConfigError(f"{section}.{field}:{text.split(':', 1)[1]}") from None


def sensor_params(cfg: Config):
    """Build :class:`~muscle_sim.sensors.SensorParams` from ``plant.sensors``."""
    from .sensors import SensorParams

    return _build(SensorParams, cfg.get("plant.sensors"), "plant.sensors")


def drift_params(cfg: Config):
    """Build :class:`~muscle_sim.drift.DriftParams` from ``plant.drift``."""
    from .drift import DriftParams

    return _build(DriftParams, cfg.get("plant.drift"), "plant.drift")


def strike_task(cfg: Config):
    """Build the :class:`~muscle_sim.tasks.StrikeTask` of the ``task`` section."""
    from .tasks import task_from_config

    return task_from_config(cfg.get("task"))


# --- single keys, for tools that change one key of a config (sweeps) -----------------------------

def schema_keys(schema: dict | None = None, prefix: str = ""):
    """``(key path, Key)`` of every key of ``schema`` (default: :data:`SCHEMA`), in its order."""
    for name, spec in (SCHEMA if schema is None else schema).items():
        if isinstance(spec, dict):
            yield from schema_keys(spec, f"{prefix}{name}.")
        else:
            yield f"{prefix}{name}", spec


def schema_key(dotted: str, where: str | None = None) -> Key:
    """The declaration of the config key at ``dotted`` (e.g. ``"plant.joint.payload_mass"``).

    A path that names no key (or a section) is a one-line ConfigError naming ``where`` (default:
    the path itself) with the closest key path."""
    keys = dict(schema_keys())
    if dotted in keys:
        return keys[dotted]
    close = difflib.get_close_matches(str(dotted), list(keys), n=1)
    hint = f"; did you mean '{close[0]}'?" if close else "; see configs/flipper.yaml for every key"
    raise ConfigError(f"{where or dotted}: {str(dotted)!r} is not a config key{hint}")


def convert_value(where: str, key: Key, value):
    """``value`` as written in a config (with its unit) checked against ``key`` and converted to
    SI, as :func:`load` does for each key; errors are one line naming ``where``."""
    return _convert(where, key, value)


def validate_section(schema: dict, raw, where: str) -> dict:
    """A mapping checked against a schema of :class:`Key` declarations (unknown keys with a
    did-you-mean, units, ranges, required keys, defaults), as a config section is; returns the SI
    values; errors are one line naming the key under ``where``."""
    return _resolve(schema, raw, where)
