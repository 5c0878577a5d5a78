"""Sensor models: angle encoder (quantisation, noise), rate and pressure sensors (noise, lag)."""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .compiled import law
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

    @property
    def noise_levels(self) -> np.ndarray:
        """Noise standard deviations of the channels angle, rate, pressure A, pressure B."""
        return np.array([self.angle_noise, self.rate_noise, self.pressure_noise, self.pressure_noise])

    def pressure_blend(self, dt: float) -> float:
        """Weight of the new sample in the discrete first-order pressure filter."""
        return 1.0 if self.pressure_lag == 0.0 else 1.0 - math.exp(-dt / self.pressure_lag)


@law
def readings_into(x, filtered, noise, levels, angle_step, blend, live, y):
    """Readings of states ``x`` (B, 6) into ``y`` (B, 4); ``filtered`` (B, 2) is updated in place.
    ``noise`` (B, n) holds standard normals for the noisy channels in the order angle, rate,
    pressure A, pressure B (only those whose level in ``levels`` is non-zero). Members where
    ``live`` is false are not read (their ``y`` and filter state stay as they are)."""
    for i in range(x.shape[0]):
        if not live[i]:
            continue
        col = 0
        for c in range(4):
            if c < 2:
                v = x[i, c]
            else:
                filtered[i, c - 2] = filtered[i, c - 2] + blend * (x[i, c] - filtered[i, c - 2])
                v = filtered[i, c - 2]
            if levels[c] != 0.0:
                v = v + levels[c] * noise[i, col]
                col += 1
            y[i, c] = v
        if angle_step > 0.0:
            y[i, 0] = np.round(y[i, 0] / angle_step) * angle_step


class SensorModel:
    """The sensors of ``members`` joints, stepped in place: the pressure filters' state and
    buffers are kept between calls, so one reading costs one compiled call (and one draw of
    normals). :func:`measure` is the same model as a pure function."""

    def __init__(self, sensors: SensorParams, dt: float, members: int = 1):
        self.sensors = sensors
        self.levels = sensors.noise_levels
        self.n_noisy = int(np.count_nonzero(self.levels))
        self.angle_step = 2.0 * math.pi / sensors.angle_counts if sensors.angle_counts else 0.0
        self.blend = sensors.pressure_blend(dt)
        self.filtered = np.zeros((members, 2))
        self._noise = np.empty((members, self.n_noisy))
        self._all = np.ones(members, dtype=np.bool_)

    def read(self, x, rng: np.random.Generator, out):
        """Readings of states ``x`` (members, 6) into ``out`` (members, 4); advances the filters.
        Normals come from one ``rng.standard_normal((members, n))`` draw, ``n`` the number of
        noisy channels (angle, rate, pressure A, pressure B, each only where its level is
        non-zero), member by member; a noiseless sensor leaves the generator untouched."""
        if self.n_noisy:
            rng.standard_normal(out=self._noise)
        readings_into(x, self.filtered, self._noise, self.levels, self.angle_step, self.blend, self._all, out)
        return out


def measure(sensors: SensorParams, x, filtered_pressure, rng: np.random.Generator, dt: float):
    """Readings ``[angle, rate, p_a, p_b]`` of state(s) ``x`` (..., 6) and the new pressure filter
    state (..., 2): encoder noise then quantisation (step 2 pi / counts), rate noise, pressure
    sensors as a discrete first-order lag plus noise (common practice); the pure-function face
    of :class:`SensorModel`."""
    x = np.asarray(x, dtype=float)
    lead = x.shape[:-1]
    xs = np.ascontiguousarray(x.reshape(-1, 6))
    model = SensorModel(sensors, dt, xs.shape[0])
    model.filtered[...] = np.broadcast_to(np.asarray(filtered_pressure, dtype=float), lead + (2,)).reshape(-1, 2)
    y = model.read(xs, rng, np.empty((xs.shape[0], 4)))
    return y.reshape(lead + (4,)), model.filtered.reshape(lead + (2,))
