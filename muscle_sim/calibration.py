"""Fitting the muscle model to static bench measurements (pressure, length or contraction, force).

The rest geometry (rest length, rest radius, wall) is taken as given; fitted are the end
correction ``k`` (Tondu & Lopez 2000), the effective rest braid angle and, when the data hold
both shortening and lengthening branches, the braid friction level (Tondu 2012). The fit is
``scipy.optimize.least_squares``; the parameter uncertainty is ``s^2 (J^T J)^-1`` with
``s^2 = RSS / (n - p)`` (the usual Gauss–Newton covariance estimate).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np

from . import muscle as _muscle
from .errors import DataError
from .params import NEUTRAL_BRAID_ANGLE, McKibbenParams
from .threads import single_blas_thread

BENCH_UNITS = {
    "pressure": {"bar": 1e5, "kPa": 1e3, "Pa": 1.0, "MPa": 1e6, "psi": 6894.757293168},
    "length": {"mm": 1e-3, "m": 1.0, "cm": 1e-2},
    "contraction": {"%": 0.01, "-": 1.0},
    "force": {"N": 1.0, "kN": 1e3},
    "direction": {"-": 1.0},
}


@dataclass
class BenchData:
    """Bench points in SI: gauge pressure [Pa], contraction [-], force [N], direction (+1
    shortening, -1 lengthening, 0 unknown/static)."""

    pressure: np.ndarray
    contraction: np.ndarray
    force: np.ndarray
    direction: np.ndarray


def read_bench_csv(path, rest_length: float) -> BenchData:
    """Read bench data: columns ``pressure [unit]``, ``length [unit]`` or ``contraction [unit]``,
    ``force [unit]``, optional ``direction [-]``; one-line DataError naming row and column."""
    from .records import read_unit_table

    table = read_unit_table(path, BENCH_UNITS, "bench data")
    cols = table.columns
    if "pressure" not in cols or "force" not in cols or ("length" not in cols) == ("contraction" not in cols):
        raise DataError(f"{path}: columns must be pressure, force and exactly one of length or contraction")
    if table.data.shape[0] < 5:
        raise DataError(f"{path}: {table.data.shape[0]} data rows; a fit needs at least 5")
    pressure, force = table.si("pressure"), table.si("force")
    eps = table.si("contraction") if "contraction" in cols else (rest_length - table.si("length")) / rest_length
    direction = table.si("direction") if "direction" in cols else np.zeros(table.data.shape[0])
    checks = [("pressure", pressure < 0, "gauge pressure must be >= 0"),
              ("force", force < 0, "a muscle only pulls: force must be >= 0"),
              ("length" if "length" in cols else "contraction", (eps < -0.5) | (eps >= 1.0),
               "contraction must lie in [-50 %, 100 %)"),
              ("direction", ~np.isin(direction, (-1.0, 0.0, 1.0)), "direction must be -1, 0 or 1")]
    for name, bad, why in checks:
        if name in cols and bad.any():
            table.fail(name, int(np.nonzero(bad)[0][0]), why)
    return BenchData(pressure, eps, force, direction)


@dataclass
class CalibrationResult:
    """Fitted muscle, parameter values with standard deviations, residuals; scipy-style status."""

    success: bool
    status: int
    message: str
    params: McKibbenParams
    names: list
    values: np.ndarray
    std: np.ndarray
    residual_rms: float
    residuals: np.ndarray


def model_force(base: McKibbenParams, data: BenchData, end_correction, braid_angle, friction):
    """Bench force of the model: static force less (shortening) or plus (lengthening) friction."""
    p = replace(base, end_correction=end_correction, rest_braid_angle=braid_angle, braid_friction=friction)
    static = _muscle.static_force(p, data.pressure, data.contraction)
    fric = friction * math.pi * p.rest_radius ** 2 * _muscle.net_pressure(p, data.pressure)
    return np.where(static > 0, np.maximum(static - data.direction * fric, 0.0), 0.0)


@single_blas_thread
def calibrate(base: McKibbenParams, data: BenchData) -> CalibrationResult:
    """Fit end correction, effective braid angle and (with both branches) friction to ``data``."""
    from scipy.optimize import least_squares

    fit_friction = bool(np.any(data.direction > 0) and np.any(data.direction < 0))
    names = ["end_correction", "rest_braid_angle"] + (["braid_friction"] if fit_friction else [])
    x0 = [max(base.end_correction, 1.0), base.rest_braid_angle] + ([0.02] if fit_friction else [])
    lo = [1.0, math.radians(5.0)] + ([0.0] if fit_friction else [])
    hi = [3.0, NEUTRAL_BRAID_ANGLE - 1e-3] + ([0.5] if fit_friction else [])
    pulling = data.force > 0           # points at zero force carry no shape information

    def residual(x):
        fric = x[2] if fit_friction else 0.0
        return (model_force(base, data, x[0], x[1], fric) - data.force)[pulling]

    sol = least_squares(residual, x0, bounds=(lo, hi), x_scale=[0.1, 0.05] + ([0.01] if fit_friction else []),
                        xtol=1e-12, ftol=1e-12, gtol=1e-12)
    res = sol.fun
    dof = max(res.size - len(x0), 1)
    s2 = float(res @ res) / dof
    try:
        cov = s2 * np.linalg.inv(sol.jac.T @ sol.jac)
        std = np.sqrt(np.maximum(np.diag(cov), 0.0))
    except np.linalg.LinAlgError:
        std = np.full(len(x0), np.nan)
    fitted = replace(base, end_correction=float(sol.x[0]), rest_braid_angle=float(sol.x[1]),
                     braid_friction=float(sol.x[2]) if fit_friction else base.braid_friction)
    success, message = bool(sol.success), str(sol.message)
    # a value pinned at a bound or without a finite uncertainty is no fit: the data (or its
    # units, e.g. kN read as N) do not fit the model, whatever the optimiser reports
    span = np.asarray(hi) - np.asarray(lo)
    at_bound = [n for n, x, a, b, w in zip(names, sol.x, lo, hi, span) if min(x - a, b - x) <= 1e-6 * w]
    undefined = [n for n, sd in zip(names, std) if not np.isfinite(sd)]
    if at_bound or undefined:
        success = False
        message = "; ".join(part for part in (
            f"{', '.join(at_bound)} at the bound of the allowed range" if at_bound else "",
            f"{', '.join(undefined)} without a finite uncertainty" if undefined else "") if part) + \
            " (check the data's units and the rest geometry assumed)"
    return CalibrationResult(success, int(sol.status), message, fitted, names,
                             np.asarray(sol.x), std, float(np.sqrt(np.mean(res ** 2))), res)


def config_snippet(result: CalibrationResult) -> str:
    """YAML lines to paste into a config: the fitted muscle, and a prior that uses it."""
    p = result.params
    lines = ["# fitted by pamjoint calibrate (values +- one standard deviation)", "plant:", "  muscle:",
             f"    rest_braid_angle: {math.degrees(p.rest_braid_angle):.3f} deg"
             f"   # +- {math.degrees(result.std[1]):.3f}",
             f"    end_correction: {p.end_correction:.4f}   # +- {result.std[0]:.4f}"]
    if "braid_friction" in result.names:
        lines.append(f"    braid_friction: {p.braid_friction:.4f}   # +- {result.std[2]:.4f}")
    lines += ["prior:", "  muscle_model: plant   # the prior uses the calibrated muscle"]
    return "\n".join(lines) + "\n"
