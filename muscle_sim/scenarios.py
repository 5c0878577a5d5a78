"""Seeded random mismatch scenarios: a config drawn from a base config over the ranges of the
named scenarios in ``configs/scenarios/``.

:func:`draw_scenario` changes what the plant is and what the prior believes, nothing else: the
payload the plant carries against the one the prior believes, the prior's paddle inertia, the tube
length and valve dead time against the prior's delay, braid friction and sensor noise, the plant
muscle's force-model error, trial-to-trial drift and the strike speed. It returns a raw config
(values with units, as in a YAML file), so a draw can be written out, checked with
``pamjoint check`` and tuned like any other config. The draw depends only on the generator passed
in: ``draw_scenario(base, numpy.random.default_rng(i))`` is draw ``i``, whatever else ran before.

:func:`with_matched_prior` gives the same config with a prior as close to its plant as the prior's
models go: a second run with it can show that a strike is within the plant's reach.

The module lives beside the config code, not among the controllers, because it decides no
pressures: it only makes configs.
"""
from __future__ import annotations

import copy
import math

import numpy as np

from . import config as _config
from .pneumatics import tube_delay

#: Ranges of a draw. ``log`` ranges are drawn uniformly in the logarithm (factors), the others
#: uniformly. They span the named scenarios of ``configs/scenarios/``; the strike speed stops
#: short of the near-limit scenario's 16 rad/s, yet a draw that combines a fast strike with a weak
#: muscle, a heavy payload and long tubes can still come near or beyond what the muscles give
#: within the rated pressure (the learning benchmark's matched-prior run helps to tell).
RANGES = {
    "payload_factor": (0.5, 3.0, "log"),         # plant payload / payload the prior believes
    "inertia_error": (-0.5, 0.5, "uniform"),     # prior.inertia_error
    "tube_length": (0.5, 5.0, "uniform"),        # m
    "valve_dead_time": (0.0, 0.004, "uniform"),  # s
    "delay_factor": (1 / 3, 3.0, "log"),         # prior delay / true delay (tube + valve dead time)
    "friction_factor": (1.0, 4.0, "log"),        # plant braid friction / the base config's
    "noise_factor": (1.0, 5.0, "log"),           # sensor noise / the base config's
    "force_error": (0.0, 0.7, "uniform"),        # the law over-estimates the plant's force by this share
    "strike_speed": (10.0, 15.0, "uniform"),     # rad/s
}

#: Chance that a draw has trial-to-trial drift, and the ranges of its strength when it does.
DRIFT_PROBABILITY = 0.25
DRIFT_RANGES = {
    "friction_growth": (0.0, 0.05),   # per trial
    "supply_sag": (0.0, 4000.0),      # Pa per trial (0 .. 0.04 bar)
    "spread": (0.0, 0.03),
}
#: The supply never sags below this in a drawn drift [Pa].
DRIFT_SUPPLY_FLOOR = 5e5


def _draw(rng: np.random.Generator, name: str) -> float:
    low, high, how = RANGES[name]
    if how == "log":
        return float(math.exp(rng.uniform(math.log(low), math.log(high))))
    return float(rng.uniform(low, high))


def _text(value: float, unit: str = "") -> str:
    """``value`` to four significant digits with its unit, as a config value."""
    number = f"{value:.4g}"
    return f"{number} {unit}" if unit else number


def draw_scenario(base_raw_config: dict, rng: np.random.Generator) -> dict:
    """A raw config: ``base_raw_config`` with a mismatch drawn from ``rng`` over :data:`RANGES`.

    The prior believes the base config's payload (``prior.payload_mass``); the plant carries
    ``payload_factor`` times it. The prior's delay is ``delay_factor`` times the true delay of the
    drawn tube and valve dead time. Braid friction and the three sensor noises are the base
    config's times their factors; ``plant.muscle.force_scale`` is ``1 / (1 + force_error)``.
    With probability :data:`DRIFT_PROBABILITY` the plant drifts (friction growth, supply sag
    down to :data:`DRIFT_SUPPLY_FLOOR`, spread); otherwise it does not. The base config must be
    valid; it is not modified.
    """
    base = _config.load(base_raw_config)
    raw = copy.deepcopy(dict(base_raw_config))
    plant = raw.setdefault("plant", {})
    muscle, joint = plant.setdefault("muscle", {}), plant.setdefault("joint", {})
    pneumatics, sensors = plant.setdefault("pneumatics", {}), plant.setdefault("sensors", {})
    prior, task = raw.setdefault("prior", {}), raw.setdefault("task", {})

    draws = {name: _draw(rng, name) for name in RANGES}
    believed = base.get("plant.joint.payload_mass")
    prior["payload_mass"] = _text(believed, "kg")
    joint["payload_mass"] = _text(believed * draws["payload_factor"], "kg")
    prior["inertia_error"] = _text(100 * draws["inertia_error"], "%")

    pneumatics["tube_length"] = _text(draws["tube_length"], "m")
    pneumatics["valve_dead_time"] = _text(1e3 * draws["valve_dead_time"], "ms")
    true_delay = tube_delay(draws["tube_length"], base.get("plant.pneumatics.temperature")) + draws["valve_dead_time"]
    prior["pressure_delay"] = _text(1e3 * true_delay * draws["delay_factor"], "ms")

    muscle["braid_friction"] = _text(min(base.get("plant.muscle.braid_friction") * draws["friction_factor"], 1.0))
    for key, unit, factor in (("angle_noise", "deg", 180 / math.pi), ("rate_noise", "deg/s", 180 / math.pi),
                              ("pressure_noise", "kPa", 1e-3)):
        sensors[key] = _text(base.get(f"plant.sensors.{key}") * factor * draws["noise_factor"], unit)
    muscle["force_scale"] = _text(1.0 / (1.0 + draws["force_error"]))
    task["strike_speed"] = _text(draws["strike_speed"], "rad/s")

    drifting = bool(rng.uniform() < DRIFT_PROBABILITY)
    drift = {name: float(rng.uniform(low, high)) for name, (low, high) in DRIFT_RANGES.items()}
    if drifting:
        plant["drift"] = {"friction_growth": _text(100 * drift["friction_growth"], "%"),
                          "supply_sag": _text(drift["supply_sag"] / 1e5, "bar"),
                          "supply_floor": _text(DRIFT_SUPPLY_FLOOR / 1e5, "bar"),
                          "spread": _text(100 * drift["spread"], "%")}
    else:
        plant["drift"] = {"friction_growth": "0 %", "supply_sag": "0 bar", "spread": "0 %"}

    raw["name"] = f"{base.get('name') or 'config'} (random mismatch)"
    raw["description"] = (
        f"Random mismatch scenario: payload x{draws['payload_factor']:.3g} of the "
        f"prior's {believed:.3g} kg, prior inertia error {100 * draws['inertia_error']:+.3g} %, tube "
        f"{draws['tube_length']:.3g} m, valve dead time {1e3 * draws['valve_dead_time']:.3g} ms, prior delay "
        f"x{draws['delay_factor']:.3g} of the true one, braid friction x{draws['friction_factor']:.3g}, "
        f"sensor noise x{draws['noise_factor']:.3g}, force over-estimated by {100 * draws['force_error']:.3g} %, "
        f"strike speed {draws['strike_speed']:.3g} rad/s, " + ("drift on." if drifting else "no drift."))
    return raw


def with_matched_prior(raw_config: dict) -> dict:
    """``raw_config`` with a prior as close to the plant as the prior's models go: the plant's
    muscle (braid friction as the tanh law, the plant's force scale), payload, paddle inertia and
    pivot friction, the valve flow model and the true delay. Only what the prior cannot represent
    is left out (Maxwell-slip hysteresis, drift). The input is not modified."""
    raw = copy.deepcopy(dict(raw_config))
    plant_muscle = raw.get("plant", {}).get("muscle", {})
    prior = raw.setdefault("prior", {})
    prior.update({"muscle_model": "plant", "end_correction": None, "payload_known": True, "payload_mass": None,
                  "payload_radius": None, "inertia_error": "0 %", "pivot_friction": True,
                  "viscous_damping": None, "coulomb_torque": None,
                  "force_scale": plant_muscle.get("force_scale", _config.MUSCLE_KEYS["force_scale"].default),
                  "pressure_model": "valve", "pressure_delay": None})
    return raw
