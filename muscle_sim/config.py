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
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping

import yaml

from .errors import ConfigError, ParameterError
from .params import McKibbenParams
from .units import UNITS, UnitError, allowed_units, to_si

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
)

MUSCLE_MAP_KEYS = _section(
    pressures=Key("pressure", "gauge pressures tabulated by `pamjoint muscle`", many=True, low=0,
                  default=None, unit="bar"),
    contraction_step=Key("dimensionless", "contraction step of the force table", default=0.025, low=0,
                         high=0.2, low_open=True),
    usable_fraction=Key("dimensionless", "share of the maximum contraction counted as usable",
                        default=0.8, low=0, high=1.0, low_open=True),
)

#: Declared layout of a pamjoint config (extended by later sections as the tool grows).
SCHEMA: dict = {
    "name": Key("str", "a short name for the setup", default=""),
    "description": Key("str", "free text about the setup", default=""),
    "plant": {"muscle": MUSCLE_KEYS},
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


def load(source) -> Config:
    """Read and validate a config from a YAML path or an already-parsed mapping."""
    if isinstance(source, (str, Path)):
        path = Path(source)
        try:
            text = path.read_text(encoding="utf-8")
        except OSError as exc:
            raise ConfigError(f"config: cannot read {str(path)!r}: {exc.strerror or exc}") from None
        try:
            raw = yaml.safe_load(text)
        except yaml.YAMLError as exc:
            mark = getattr(exc, "problem_mark", None)
            where = f" at line {mark.line + 1}" if mark is not None else ""
            raise ConfigError(f"config: {str(path)!r} is not valid YAML{where}") from None
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
    muscle_params(cfg)  # builds and validates the muscle


def muscle_params(cfg: Config, section: str = "plant.muscle") -> McKibbenParams:
    """Build :class:`McKibbenParams` from a config section; errors carry the key path."""
    values = cfg.get(section)
    try:
        return McKibbenParams(**values)
    except ParameterError as exc:
        field = str(exc).split(":", 1)[0].split(".", 1)[-1]
        raise ConfigError(f"{section}.{field}:{str(exc).split(':', 1)[1]}") from None
