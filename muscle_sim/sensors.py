"""Sensor models: angle encoder (quantisation, noise), rate and pressure sensors (noise, lag)."""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .params import _validate


@dataclass(frozen=True)
class SensorParams:
    """Sensors of the joint (SI units).

    Attributes
    ----------
    angle_counts : int
        Encoder counts per revolution; 0 for no quantisation.
    angle_noise, rate_noise : float
        Standard deviations of additive Gaussian noise [rad], [rad/s].
    pressure_noise : float
        Standard deviation of the pressure sensors' noise [Pa].
    pressure_lag : float
        First-order time constant of the pressure sensors [s]; 0 for none.
    """

    angle_counts: int = 0
    angle_noise: float = 0.0
    rate_noise: float = 0.0
    pressure_noise: float = 0.0
    pressure_lag: float = 0.0

    def __post_init__(self) -> None:
        _validate(self, {"angle_counts": (0, 1 << 32, "", False), "angle_noise": (0, 1, "rad", False),
                         "rate_noise": (0, 100, "rad/s", False), "pressure_noise": (0, 1e6, "Pa", False),
                         "pressure_lag": (0, 10, "s", False)})

    def pressure_blend(self, dt: float) -> float:
        """Weight of the new sample in the discrete first-order pressure filter."""
        return 1.0 if self.pressure_lag == 0.0 else 1.0 - math.exp(-dt / self.pressure_lag)


def measure(sensors: SensorParams, x, filtered_pressure, rng: np.random.Generator, dt: float):
    """Readings ``[angle, rate, p_a, p_b]`` of state(s) ``x`` (..., 6) and the new pressure filter
    state (..., 2). Noise is drawn from ``rng`` only where its level is non-zero, so a noiseless
    sensor leaves the generator untouched."""
    x = np.asarray(x, dtype=float)
    blend = sensors.pressure_blend(dt)
    pressures = filtered_pressure + blend * (x[..., 2:4] - filtered_pressure)
    y = np.empty(x.shape[:-1] + (4,))
    y[..., 0] = x[..., 0]
    y[..., 1] = x[..., 1]
    y[..., 2:4] = pressures
    if sensors.angle_noise:
        y[..., 0] += sensors.angle_noise * rng.standard_normal(x.shape[:-1])
    if sensors.angle_counts:
        step = 2.0 * math.pi / sensors.angle_counts
        y[..., 0] = np.round(y[..., 0] / step) * step
    if sensors.rate_noise:
        y[..., 1] += sensors.rate_noise * rng.standard_normal(x.shape[:-1])
    if sensors.pressure_noise:
        y[..., 2:4] += sensors.pressure_noise * rng.standard_normal(x.shape[:-1] + (2,))
    return y, pressures


def measure_f(sensors: SensorParams, x, filtered_pressure, rng: np.random.Generator, dt: float):
    """Python-float twin of :func:`measure` for one state (same equations, no numpy arrays).

    Draws the same random numbers in the same order as :func:`measure` with a batch of one
    (angle, rate, pressure A, pressure B, each only where its level is non-zero), in one call:
    a Generator's normals come out the same drawn together or one by one."""
    blend = sensors.pressure_blend(dt)
    f0, f1 = filtered_pressure
    fa = f0 + blend * (x[2] - f0)
    fb = f1 + blend * (x[3] - f1)
    angle, rate = x[0], x[1]
    angle_noise, rate_noise, pressure_noise = sensors.angle_noise, sensors.rate_noise, sensors.pressure_noise
    if angle_noise and rate_noise and pressure_noise:          # the usual case: every sensor noisy
        za, zr, z1, z2 = rng.standard_normal(4).tolist()
        angle += angle_noise * za
        rate += rate_noise * zr
        pa, pb = fa + pressure_noise * z1, fb + pressure_noise * z2
    else:
        pa, pb = fa, fb
        if angle_noise or rate_noise or pressure_noise:
            z = rng.standard_normal((angle_noise != 0.0) + (rate_noise != 0.0) + 2 * (pressure_noise != 0.0))
            z = z.tolist()
            if angle_noise:
                angle += angle_noise * z.pop(0)
            if rate_noise:
                rate += rate_noise * z.pop(0)
            if pressure_noise:
                pa += pressure_noise * z[0]
                pb += pressure_noise * z[1]
    if sensors.angle_counts:
        step = 2.0 * math.pi / sensors.angle_counts
        angle = round(angle / step) * step
    return [angle, rate, pa, pb], (fa, fb)
