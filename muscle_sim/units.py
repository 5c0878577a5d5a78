"""Physical quantities written with units ("6 bar", "250 mm", "22 deg") converted to SI.

Used only at the config and CLI boundary; inside the code everything is SI. A small explicit
table is used rather than a units library: configs need a few dozen units, and an explicit
table gives error messages that list exactly what each field accepts.
"""
from __future__ import annotations

import math
import re

#: For each kind of quantity: unit symbol -> factor to the SI unit (first entry is the SI unit).
UNITS: dict[str, dict[str, float]] = {
    "length": {"m": 1.0, "cm": 1e-2, "mm": 1e-3, "um": 1e-6, "in": 0.0254},
    "angle": {"rad": 1.0, "deg": math.pi / 180.0},
    "pressure": {"Pa": 1.0, "kPa": 1e3, "MPa": 1e6, "bar": 1e5, "mbar": 1e2, "psi": 6894.757293168},
    "time": {"s": 1.0, "ms": 1e-3},
    "frequency": {"Hz": 1.0, "kHz": 1e3},
    "mass": {"kg": 1.0, "g": 1e-3},
    "inertia": {"kg m^2": 1.0, "g cm^2": 1e-7, "kg cm^2": 1e-4},
    "volume": {"m^3": 1.0, "cm^3": 1e-6, "ml": 1e-6, "l": 1e-3, "dm^3": 1e-3},
    "angular_velocity": {"rad/s": 1.0, "deg/s": math.pi / 180.0},
    "torque": {"N m": 1.0, "N mm": 1e-3},
    "force": {"N": 1.0, "kN": 1e3},
    "rotational_damping": {"N m s/rad": 1.0},
    "rotational_stiffness": {"N m/rad": 1.0, "N m/deg": 180.0 / math.pi},
    # ISO 6358 sonic conductance; 1 dm^3/(s bar) = 1e-8 m^3/(s Pa) (ISO 6358-1:2013)
    "sonic_conductance": {"m^3/(s Pa)": 1.0, "dm^3/(s bar)": 1e-8, "l/(s bar)": 1e-8},
    "temperature": {"K": 1.0},
    "rate": {"1/s": 1.0},
    "pressure_rate": {"Pa/s": 1.0, "bar/s": 1e5, "kPa/s": 1e3},
    # feedback gains: pressure per angle, per angle-time (integral), time per angle (derivative)
    "pressure_per_angle": {"Pa/rad": 1.0, "kPa/rad": 1e3, "bar/rad": 1e5, "kPa/deg": 1e3 * 180.0 / math.pi,
                           "bar/deg": 1e5 * 180.0 / math.pi},
    "pressure_per_angle_time": {"Pa/(rad s)": 1.0, "kPa/(rad s)": 1e3, "bar/(rad s)": 1e5,
                                "kPa/(deg s)": 1e3 * 180.0 / math.pi, "bar/(deg s)": 1e5 * 180.0 / math.pi},
    "pressure_time_per_angle": {"Pa s/rad": 1.0, "kPa s/rad": 1e3, "bar s/rad": 1e5,
                                "kPa s/deg": 1e3 * 180.0 / math.pi, "bar s/deg": 1e5 * 180.0 / math.pi,
                                "bar ms/deg": 1e2 * 180.0 / math.pi},
    "dimensionless": {"": 1.0, "%": 0.01},
}

_NUMBER = re.compile(r"^\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*(.*?)\s*$")


class UnitError(ValueError):
    """A value's unit is missing or does not fit the quantity (message is one line)."""


def allowed_units(kind: str) -> str:
    """Comma-separated list of the unit symbols accepted for ``kind``."""
    return ", ".join(u if u else "(none)" for u in UNITS[kind])


def to_si(value, kind: str) -> float:
    """Convert ``value`` (number or "number unit" string) of quantity ``kind`` to SI.

    A bare number is accepted only for dimensionless quantities, so a forgotten unit is an
    error rather than a silent factor of 1000.
    """
    table = UNITS[kind]
    if isinstance(value, bool):
        raise UnitError(f"{value!r} is not a quantity; write e.g. '{_example(kind)}'")
    if isinstance(value, (int, float)):
        if kind == "dimensionless":
            number, unit = float(value), ""
        else:
            raise UnitError(f"{value!r} has no unit; write e.g. '{_example(kind)}' "
                            f"(units: {allowed_units(kind)})")
    elif isinstance(value, str):
        match = _NUMBER.match(value)
        if not match:
            raise UnitError(f"{value!r} is not 'number unit'; write e.g. '{_example(kind)}'")
        number, unit = float(match.group(1)), " ".join(match.group(2).split())
        if unit not in table:
            raise UnitError(f"{value!r}: unit '{unit}' is not one of {allowed_units(kind)}")
    else:
        raise UnitError(f"{value!r} is not a quantity; write e.g. '{_example(kind)}'")
    si = number * table[unit]
    if not math.isfinite(si):
        raise UnitError(f"{value!r} is not finite")
    return si


def _example(kind: str) -> str:
    unit = next(iter(UNITS[kind]))
    return f"1 {unit}".strip()
