"""Identification of the prior model's uncertain dynamic parameters from logged trials.

The prior (``setup.prior``) is simulated with a trial's logged commands from its logged initial
state (:func:`muscle_sim.integrate.simulate`, the very simulator the learner linearises) and its
parameters are fitted by nonlinear least squares (``scipy.optimize.least_squares``, trust-region
reflective with bounds) so that it reproduces the measured angle and, where logged, the measured
pressures. Each residual is divided by its sensor's noise level (one standard deviation), so the
fit weighs angle against pressure as the sensors deserve.

Parameters (named as the ``prior`` config keys that set them):

=========================  ========================================================  ==========
``payload_mass``           payload mass ``m``: inertia ``m r^2`` (and ``m g r`` under gravity)  kg
``payload_radius``         where the payload rides, ``r``; only seen under gravity   m
``viscous_damping``        pivot viscous friction                                     N m s/rad
``coulomb_torque``         pivot dry friction (tanh-smoothed as in the plant)         N m
``pressure_time_constant`` time constant of the first-order pressure lag              s
``pressure_delay``         command dead time                                          s
``force_scale``            multiplier on the muscle tension                           -
``sonic_conductance``      ISO 6358 sonic conductance C of the valves (valve-flow     m^3/(s Pa)
                           prior only: a datasheet value, often off by tens of %)
=========================  ========================================================  ==========

Pressure law. :func:`select_pressure_law` fits the prior with each pressure law (regulator lag,
valve flow) and keeps the one whose predicted pressures match the logged ones clearly better.

Stages. The prior's first-order lag makes its pressures independent of the motion. So when every
trial logs both pressures, the pressure response (dead time, time constant) is fitted to the
pressure residuals alone, and then the mechanics (payload, friction, force scale) to angle and
pressures with that response, its uncertainty carried along (``dz = -J^+ J_c dc``, the first-order
two-step correction of Murphy & Topel 1985, J. Business & Economic Statistics 3(4)).
Fitted together, mechanical model errors the prior cannot represent would leak into the pressure
response (on the demo's valve plant the lag grew fourfold and the pressure error with it).
Without logged pressures everything is fitted together to the angle.

Initial state. Each trial starts at rest, holding the pressures it starts with (the commands
before ``t = 0`` equal them). Logged initial pressures are fitted as nuisance parameters (two per
trial): a single noisy first reading would otherwise bias the whole fit by several sigma.

Dead time. The simulator applies the delay in whole physics sub-steps, so the residual is a step
function of it. It is fitted by a 1-D search over sub-step multiples with every other parameter
fitted inside (a profile least squares): the delay found is exactly one the simulator, and thus the
learner, will use, and the search sees the true cost of each candidate. A fractional-delay
interpolation of the commands would be smooth but would fit a model that the simulator then runs
differently (rounded); the search costs a few inner fits, each warm-started from its neighbour.
Its one-sigma uncertainty comes from the curvature of that profile (``Delta RSS = s^2``, the
profile-likelihood interval of Venzon & Moolgavkar 1988, Applied Statistics 37(1)) combined with the
rounding (sub-step ``h``, ``h / sqrt(12)``).

Local minima. An output-error fit over a whole swing has local minima where a wrong force or
inertia lets the simulated swing run out of phase with the measured one. The mechanics are
therefore first fitted to the first quarter and half of each trial, where the error still grows
monotonically with the parameter error, and then to the whole trial (common practice; multiple
shooting is the heavier remedy).

Uncertainty. ``cov = s^2 (J^T J)^-1`` (the Gauss-Newton asymptotic covariance, Seber & Wild 1989,
Nonlinear Regression, ch. 2) with ``s^2 = max(RSS / (n - p), 1)``: the
residuals are already in units of sensor noise, so a fit never claims to be better than the
sensors; under model mismatch the residuals are correlated and these figures are optimistic.

Excitation. Before the fit, parameters whose columns of the (column-normalised) Jacobian at the
prior are nil or nearly a combination of others' (condition index above 1000: the collinearity
diagnosis of Belsley, Kuh & Welsch 1980, Regression Diagnostics, ch. 3, where 30 already counts as
strong) are released; after it, a parameter whose one sigma exceeds ``relative_tolerance``
times ``max(|value|, floor)`` is, where the floor is the magnitude that would move the angle by about
1 deg over the trial (derived from ``J qdd = tau`` integrated twice), so that a parameter the data
pin near zero counts as excited. Parameters go one at a time, least trusted first (the order of
:data:`PARAMETERS` from the end), keep their prior value, and the rest are fitted again. Two
degeneracies are structural: without gravity only ``m r^2`` is seen (not ``r``); and a swing shows
only ratios to the inertia (``force_scale / J``, friction / J) unless a torque of known size acts
(the paddle's gravity with the payload radius held, the end stops), so ``force_scale`` and
``payload_mass`` can seldom both be fitted: then ``force_scale`` is released.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field, replace

import numpy as np

from muscle_sim.errors import DataError, ParameterError, SimulationDiverged
from muscle_sim.integrate import delay_substeps, simulate
from muscle_sim.params import PlantParams

#: Identifiable parameters, most trusted first; when the data cannot tell parameters apart the
#: last of them in this order is released first.
PARAMETERS = ("pressure_delay", "pressure_time_constant", "sonic_conductance", "payload_mass",
              "viscous_damping", "coulomb_torque", "payload_radius", "force_scale")

#: SI unit of each parameter.
SI_UNITS = {"payload_mass": "kg", "payload_radius": "m", "viscous_damping": "N m s/rad",
            "coulomb_torque": "N m", "pressure_time_constant": "s", "pressure_delay": "s",
            "force_scale": "", "sonic_conductance": "m^3/(s Pa)"}

#: Units people read (config and CLI): parameter -> (unit, SI value per unit).
DISPLAY_UNITS = {"payload_mass": ("kg", 1.0), "payload_radius": ("mm", 1e-3),
                 "viscous_damping": ("N m s/rad", 1.0), "coulomb_torque": ("N m", 1.0),
                 "pressure_time_constant": ("ms", 1e-3), "pressure_delay": ("ms", 1e-3),
                 "force_scale": ("", 1.0), "sonic_conductance": ("dm^3/(s bar)", 1e-8)}

_GRAVITY = 9.80665          # standard gravity [m/s^2] (CGPM 1901), as config.py builds the prior
_ANGLE_FLOOR = math.radians(0.01)   # noise floors when no sensor noise is given [rad], [Pa]
_PRESSURE_FLOOR = 500.0             # (common practice: a good encoder / pressure transducer)
_EFFECT_ANGLE = math.radians(1.0)   # a parameter that moves the angle less than this is "near zero"
_DIVERGED_RESIDUAL = 1e4            # residual of a candidate whose simulation diverges [noise sigmas]

STATUS_MESSAGES = {
    -3: "the prior diverges on the logged commands; check the log and the config",
    -2: "the data excite none of the parameters; the prior is kept",
    -1: "a fitted parameter is stuck at a bound with undetermined uncertainty",
    0: "the fit reached its evaluation limit before converging",
    1: "`gtol` termination condition is satisfied.",
    2: "`ftol` termination condition is satisfied.",
    3: "`xtol` termination condition is satisfied.",
    4: "Both `ftol` and `xtol` termination conditions are satisfied.",
    5: "the dead-time search found its best sub-step (nothing else to fit)",
}


@dataclass(frozen=True)
class ParameterEstimate:
    """One identified parameter (SI units; see :data:`SI_UNITS`).

    ``value`` is the fitted value, or the prior's when the parameter was not fitted or not
    excited; ``std`` one standard deviation (NaN where the data do not determine it); ``note``
    says why a parameter was not excited or that it sits at a bound."""

    name: str
    prior: float
    value: float
    std: float
    fitted: bool
    excited: bool
    at_bound: bool = False
    note: str = ""


@dataclass
class IdentificationResult:
    """Outcome of :func:`identify_prior`, in the manner of scipy's result objects.

    ``residual_rms`` is the RMS of the noise-scaled residuals (about 1 when the prior explains
    the data to the sensors' noise); ``angle_rms`` and ``pressure_rms`` are ``(before, after)``
    RMS errors of the prior's prediction [rad], [Pa] (pressure NaN when no log has pressures);
    ``predictions`` holds per rollout the predicted readings ``(before, after)``, each (N+1, 4).
    """

    success: bool
    status: int
    message: str
    parameters: dict
    prior: PlantParams
    identified: PlantParams
    residual_rms: float
    residual_rms_before: float
    angle_rms: tuple
    pressure_rms: tuple
    n_samples: int
    n_simulations: int
    warnings: list = field(default_factory=list)
    predictions: list = field(default_factory=list)
    payload_radius: float = 0.0
    gravity: bool = False

    def values(self, excited_only: bool = True) -> dict:
        """Parameter values by name [SI], by default only those the data excite (JSON-ready:
        the learner can keep them in its state and re-apply them with :func:`apply_prior_values`)."""
        return {n: p.value for n, p in self.parameters.items() if p.excited or not excited_only}

    def to_dict(self) -> dict:
        """A JSON-ready summary in display units (see :data:`DISPLAY_UNITS`)."""
        params = {}
        for name, p in self.parameters.items():
            unit, scale = DISPLAY_UNITS[name]
            params[name] = {"unit": unit, "prior": p.prior / scale, "value": p.value / scale,
                            "std": p.std / scale, "fitted": p.fitted, "excited": p.excited,
                            "at_bound": p.at_bound, "note": p.note}
        return {"success": self.success, "status": self.status, "message": self.message,
                "parameters": params, "residual_rms": self.residual_rms,
                "residual_rms_before": self.residual_rms_before,
                "angle_rms_deg": {"before": math.degrees(self.angle_rms[0]), "after": math.degrees(self.angle_rms[1])},
                "pressure_rms_kpa": {"before": self.pressure_rms[0] / 1e3, "after": self.pressure_rms[1] / 1e3},
                "samples": self.n_samples, "simulations": self.n_simulations, "warnings": list(self.warnings)}


# --- the prior's parameters -----------------------------------------------------------------

@dataclass(frozen=True)
class _Geometry:
    """How the prior describes its payload: lever arm ``radius`` [m], the paddle's own gravity
    moment [N m] (payload excluded) and whether gravity acts."""

    radius: float
    paddle_moment: float
    gravity: bool


def _geometry(prior: PlantParams, payload_radius: float | None, gravity: bool | None) -> _Geometry:
    j = prior.joint
    if gravity is None:
        gravity = j.gravity_moment > 0.0 or j.gravity_offset != 0.0
    radius = float(payload_radius) if payload_radius is not None else 0.0
    if not (math.isfinite(radius) and radius >= 0.0):
        raise ParameterError(f"payload_radius: {payload_radius!r} m is not allowed; must be a finite number >= 0")
    mass = j.payload_inertia / radius ** 2 if radius > 0 else 0.0
    paddle = max(j.gravity_moment - mass * _GRAVITY * radius, 0.0) if gravity else 0.0
    return _Geometry(radius, paddle, bool(gravity))


def _prior_values(prior: PlantParams, geo: _Geometry) -> dict:
    j, pn = prior.joint, prior.pneumatics
    return {"payload_mass": j.payload_inertia / geo.radius ** 2 if geo.radius > 0 else 0.0,
            "payload_radius": geo.radius, "viscous_damping": j.viscous_damping,
            "coulomb_torque": j.coulomb_torque, "pressure_time_constant": pn.lag_time_constant,
            "pressure_delay": pn.delay, "force_scale": prior.muscle.force_scale,
            "sonic_conductance": pn.sonic_conductance}


def _apply(prior: PlantParams, values: dict, geo: _Geometry) -> PlantParams:
    """``prior`` with the parameters in ``values`` (SI) replaced; the others untouched."""
    j, pn, mu = prior.joint, prior.pneumatics, prior.muscle
    joint_changes, pn_changes = {}, {}
    if "payload_mass" in values or "payload_radius" in values:
        base = _prior_values(prior, geo)
        m = float(values.get("payload_mass", base["payload_mass"]))
        r = float(values.get("payload_radius", geo.radius))
        joint_changes["payload_inertia"] = m * r * r
        if geo.gravity:
            joint_changes["gravity_moment"] = geo.paddle_moment + m * _GRAVITY * r
    for name in ("viscous_damping", "coulomb_torque"):
        if name in values:
            joint_changes[name] = float(values[name])
    if "pressure_time_constant" in values:
        pn_changes["lag_time_constant"] = float(values["pressure_time_constant"])
    if "pressure_delay" in values:
        pn_changes["delay"] = float(values["pressure_delay"])
    if "sonic_conductance" in values:
        pn_changes["sonic_conductance"] = float(values["sonic_conductance"])
    if joint_changes:
        j = replace(j, **joint_changes)
    if pn_changes:
        pn = replace(pn, **pn_changes)
    if "force_scale" in values:
        mu = replace(mu, force_scale=float(values["force_scale"]))
    return PlantParams(mu, j, pn)


def apply_prior_values(prior: PlantParams, values: dict, *, payload_radius: float | None = None,
                       gravity: bool | None = None) -> PlantParams:
    """``prior`` with identified parameter ``values`` (name -> SI value, see :data:`PARAMETERS`)
    put in; every other field stays. ``payload_radius`` is where the prior's payload rides
    (needed for ``payload_mass``); ``gravity`` defaults to whether the prior has a gravity torque."""
    unknown = sorted(set(values) - set(PARAMETERS))
    if unknown:
        raise ParameterError(f"values: {unknown[0]!r} is not allowed; must be one of {', '.join(PARAMETERS)}")
    geo = _geometry(prior, payload_radius, gravity)
    if ("payload_mass" in values or "payload_radius" in values) and geo.radius <= 0 \
            and "payload_radius" not in values:
        raise ParameterError("payload_radius: 0 m is not allowed for a payload mass; must be > 0 "
                             "(where the payload rides)")
    return _apply(prior, dict(values), geo)


def updated_prior(result: IdentificationResult) -> PlantParams:
    """The prior of ``result`` with only its identified (excited) parameters changed."""
    return apply_prior_values(result.prior, result.values(), payload_radius=result.payload_radius,
                              gravity=result.gravity)


# --- data -----------------------------------------------------------------------------------

@dataclass
class _Trial:
    """One logged trial as the fit uses it: initial readings, commands, measured samples 1..N."""

    x0: np.ndarray               # initial state [angle, rate, p_a, p_b, 0, 0]
    commands: np.ndarray         # (N, 2) commands acting over steps 0..N-1
    angle: np.ndarray            # (N,) measured angle at samples 1..N
    pressure: np.ndarray | None  # (N, 2) measured pressures at samples 1..N, None when not logged


def _trials(rollouts, task) -> list:
    if not isinstance(rollouts, (list, tuple)) or not rollouts:
        raise DataError("rollouts: none given; identification needs at least one logged trial")
    out = []
    for i, r in enumerate(rollouts, start=1):
        t = np.asarray(r.t, dtype=float)
        y = np.asarray(r.measured, dtype=float)
        u = np.asarray(r.command, dtype=float)
        if t.ndim != 1 or t.size < 10 or y.shape != (t.size, 4) or u.shape != (t.size, 2):
            raise DataError(f"rollout {i}: {t.size} samples with readings {y.shape} and commands {u.shape} are "
                            f"not allowed; must be at least 10 samples with 4 readings and 2 commands each")
        off = np.abs(np.diff(t) - task.dt) > 1e-6 * task.dt + 1e-9
        if off.any():
            k = int(np.nonzero(off)[0][0])
            raise DataError(f"rollout {i}: time step {t[k + 1] - t[k]:g} s after sample {k} is not allowed; must "
                            f"be the task's control step {task.dt:g} s")
        if not (np.all(np.isfinite(y[:, 0])) and np.all(np.isfinite(u))):
            raise DataError(f"rollout {i}: angles and commands must be finite")
        p = y[:, 2:4]
        logged = bool(np.all(np.isfinite(p)))
        p0 = p[0] if logged else u[0]
        rate0 = y[0, 1] if np.isfinite(y[0, 1]) else 0.0
        x0 = np.array([y[0, 0], rate0, p0[0], p0[1], 0.0, 0.0])
        out.append(_Trial(x0, u[:-1], y[1:, 0], p[1:] if logged else None))
    return out


def _noise_levels(sensors, angle_noise, pressure_noise):
    """Standard deviations of an angle and a pressure reading [rad], [Pa]: encoder noise with
    its quantisation ``step / sqrt(12)`` (uniform rounding error), floored."""
    if angle_noise is None:
        angle_noise = 0.0
        if sensors is not None:
            q = 2.0 * math.pi / sensors.angle_counts if sensors.angle_counts else 0.0
            angle_noise = math.hypot(sensors.angle_noise, q / math.sqrt(12.0))
    if pressure_noise is None:
        pressure_noise = sensors.pressure_noise if sensors is not None else 0.0
    return max(float(angle_noise), _ANGLE_FLOOR), max(float(pressure_noise), _PRESSURE_FLOOR)


# --- residuals --------------------------------------------------------------------------------

class _Problem:
    """Noise-scaled residuals of the prior on the trials.

    A trial starts at rest in the pressures it held before (its commands before ``t = 0`` equal
    its initial pressures). Where pressures are logged, those initial pressures are fitted too
    (nuisance parameters, two per trial): a single noisy first reading would otherwise bias the
    whole fit."""

    def __init__(self, trials, task, sigma_q, sigma_p, sensors):
        self.trials, self.task = trials, task
        self.sigma_q, self.sigma_p = sigma_q, sigma_p
        self.blend = sensors.pressure_blend(task.dt) if sensors is not None else 1.0
        self.n_sim = 0
        self.nuisance = [i for i, tr in enumerate(trials) if tr.pressure is not None]
        self.use_angle = True            # False: pressure residuals only (the pressure stage)
        self.horizon = 1.0               # share of each trial compared (a shorter one while warming up)

    def steps(self, i: int) -> int:
        """Control steps of trial ``i`` within the current horizon."""
        n = self.trials[i].commands.shape[0]
        return n if self.horizon >= 1.0 else min(n, max(10, int(round(self.horizon * n))))

    def predict_one(self, i: int, params: PlantParams, p0=None) -> np.ndarray:
        """Predicted readings (N+1, 4) of trial ``i`` from initial pressures ``p0`` (default the
        logged ones): angle, rate and the pressures as the pressure sensors read them (their
        first-order lag, :meth:`~muscle_sim.sensors.SensorParams.pressure_blend`)."""
        from scipy.signal import lfilter

        tr = self.trials[i]
        x0 = tr.x0.copy()
        if p0 is not None:
            x0[2:4] = p0
        self.n_sim += 1
        x = simulate(params, x0, tr.commands[:self.steps(i)], self.task.dt, self.task.n_substeps, u_before=x0[2:4])
        y = x[:, :4].copy()
        if self.blend < 1.0:
            b = self.blend
            y[:, 2:4] = lfilter([b], [1.0, b - 1.0], x[:, 2:4], axis=0, zi=((1.0 - b) * x0[2:4])[None, :])[0]
        return y

    def block(self, i: int, params: PlantParams, p0=None) -> np.ndarray:
        """Residual block of trial ``i``: (predicted - measured) / noise, angle then pressures."""
        tr = self.trials[i]
        y = self.predict_one(i, params, p0)
        n = y.shape[0] - 1
        parts = [(y[1:, 0] - tr.angle[:n]) / self.sigma_q] if self.use_angle else []
        if tr.pressure is not None:
            parts.append(((y[1:, 2:4] - tr.pressure[:n]) / self.sigma_p).ravel())
        return np.concatenate(parts) if parts else np.zeros(0)

    def sizes(self) -> list:
        return [self.steps(i) * (int(self.use_angle) + (2 if tr.pressure is not None else 0))
                for i, tr in enumerate(self.trials)]

    def residuals(self, params: PlantParams, starts=None) -> np.ndarray:
        """All residual blocks; a diverging simulation gives large residuals instead of an error."""
        starts = starts or [None] * len(self.trials)
        try:
            return np.concatenate([self.block(i, params, starts[i]) for i in range(len(self.trials))])
        except SimulationDiverged:
            return np.full(sum(self.sizes()), _DIVERGED_RESIDUAL)


@dataclass
class _Coordinates:
    """The continuous fit variables ``z``: SI value = ``scale * z``, except the payload, fitted
    as its inertia ``a = m r^2`` (and, with a free radius, ``b = m r``): both enter the torque
    balance linearly, also from a prior without payload (``m = 0``)."""

    names: list                 # continuous parameters being fitted (not the delay)
    scales: dict
    lower: dict
    upper: dict

    def unpack(self, z, fixed: dict, geo: _Geometry) -> dict:
        """Parameter values (SI) from the fit variables ``z`` and the ``fixed`` values."""
        values = dict(fixed)
        zs = dict(zip(self.names, z))
        for name in self.names:
            if name == "payload_mass":
                a = zs[name] * self.scales[name]
                if "payload_radius" in self.names:
                    b = zs["payload_radius"] * self.scales["payload_radius"]
                    values["payload_mass"] = b * b / a if a > 0 else 0.0
                    values["payload_radius"] = a / b if b > 0 else geo.radius
                else:
                    values["payload_mass"] = a / geo.radius ** 2
            elif name != "payload_radius":
                values[name] = zs[name] * self.scales[name]
        return values

    def pack(self, values: dict, geo: _Geometry) -> np.ndarray:
        """Fit variables of the parameter ``values`` (SI), kept within the bounds."""
        z = []
        for name in self.names:
            r = values.get("payload_radius", geo.radius) if "payload_radius" in self.names else geo.radius
            if name == "payload_mass":
                z.append(values["payload_mass"] * r * r / self.scales[name])
            elif name == "payload_radius":
                z.append(values["payload_mass"] * r / self.scales[name])
            else:
                z.append(values[name] / self.scales[name])
        lo, hi = self.bounds()
        return np.clip(np.array(z, dtype=float), lo, hi)

    def bounds(self):
        return (np.array([self.lower[n] for n in self.names], dtype=float),
                np.array([self.upper[n] for n in self.names], dtype=float))

    def to_values(self, z, geo: _Geometry) -> np.ndarray:
        """``d(parameter values)/dz`` (rows and columns in ``names`` order) for the covariance."""
        k = len(self.names)
        T = np.zeros((k, k))
        zs = dict(zip(self.names, z))
        for i, name in enumerate(self.names):
            if name == "payload_mass" and "payload_radius" in self.names:
                j = self.names.index("payload_radius")
                sa, sb = self.scales["payload_mass"], self.scales["payload_radius"]
                a, b = zs["payload_mass"] * sa, zs["payload_radius"] * sb
                if a > 0 and b > 0:
                    T[i, i], T[i, j] = -b * b / (a * a) * sa, 2 * b / a * sb      # m = b^2 / a
                    T[j, i], T[j, j] = sa / b, -a / (b * b) * sb                  # r = a / b
                else:
                    T[i, i] = T[j, j] = np.nan
            elif name == "payload_mass":
                T[i, i] = self.scales[name] / geo.radius ** 2
            elif name != "payload_radius":
                T[i, i] = self.scales[name]
        return T


def _coordinates(names, base, floors, geo, h) -> _Coordinates:
    scales, lower, upper = {}, {}, {}
    for n in names:
        lower[n], upper[n] = 0.0, np.inf
        if n == "payload_mass":
            scales[n] = max(base[n], floors[n]) * geo.radius ** 2
        elif n == "payload_radius":
            scales[n] = max(base["payload_mass"], floors["payload_mass"]) * geo.radius
        elif n in ("viscous_damping", "coulomb_torque"):
            scales[n] = max(base[n], floors[n])
        elif n == "pressure_time_constant":
            scales[n] = base[n]
            lower[n], upper[n] = 0.1 * h / base[n], 1.0 / base[n]
        elif n == "force_scale":
            scales[n] = 1.0
            lower[n], upper[n] = 0.05, 20.0
        elif n == "sonic_conductance":          # a datasheet value: within a factor of 10 of it
            scales[n] = base[n]
            lower[n], upper[n] = 0.1, 10.0
    return _Coordinates(list(names), scales, lower, upper)


def _floors(prior: PlantParams, trials, task, geo: _Geometry) -> dict:
    """Magnitudes below which a parameter hardly acts: each would move the angle by about
    ``_EFFECT_ANGLE`` over the logged trial (derived from ``J qdd = tau`` integrated twice,
    ``dq ~ tau T^2 / (2 J)``; a viscous torque ``c * rms rate``; an inertia change ``dJ / J``
    scaling the swing)."""
    inertia = prior.joint.total_inertia
    duration = max(tr.commands.shape[0] for tr in trials) * task.dt
    angles = np.concatenate([tr.angle for tr in trials])
    swing = max(float(np.ptp(angles)), _EFFECT_ANGLE)
    rate = max(float(np.sqrt(np.mean(np.square(np.diff(angles) / task.dt)))), 0.1)
    torque = 2.0 * inertia * _EFFECT_ANGLE / duration ** 2
    radius = geo.radius if geo.radius > 0 else 1.0
    return {"payload_mass": inertia * _EFFECT_ANGLE / swing / radius ** 2,
            "payload_radius": 0.1 * radius, "viscous_damping": torque / rate, "coulomb_torque": torque,
            "pressure_time_constant": task.dt, "pressure_delay": max(prior.pneumatics.lag_time_constant, task.dt),
            "force_scale": 1.0, "sonic_conductance": prior.pneumatics.sonic_conductance}


# --- one fit at a fixed dead time ---------------------------------------------------------------

@dataclass
class _Inner:
    """Least-squares solution at one dead time: fit variables (parameters, then the nuisance
    initial pressures), residuals, Jacobian, scipy status and active bounds."""

    steps: int
    z: np.ndarray
    res: np.ndarray
    jac: np.ndarray
    status: int
    active: np.ndarray
    values: dict
    starts: list
    carried: tuple | None = None   # (residual columns, variances) of parameters fitted in an earlier stage

    @property
    def rss(self) -> float:
        return float(self.res @ self.res)


class _InnerFit:
    """Fits the continuous parameters and the initial pressures at a given dead time."""

    def __init__(self, problem: _Problem, prior, geo, coords: _Coordinates, fixed: dict, h: float,
                 max_evaluations: int, step: float = 1e-6):
        self.problem, self.prior, self.geo, self.coords, self.fixed = problem, prior, geo, coords, fixed
        self.h, self.max_evaluations, self.step = h, max_evaluations, step
        self.k = len(coords.names)
        sp = problem.sigma_p
        supply = prior.pneumatics.supply_pressure
        p0 = [problem.trials[i].x0[2:4] for i in problem.nuisance]
        lo, hi = coords.bounds()
        # initial pressures within [0, supply] (a noisy first reading may lie just outside)
        self.lower = np.concatenate([lo] + [np.minimum(-p / sp, 0.0) for p in p0])
        self.upper = np.concatenate([hi] + [np.maximum((supply - p) / sp, 0.0) + 1e-9 for p in p0])
        self._last: dict = {}

    def split(self, z, steps: int):
        values = self.coords.unpack(z[:self.k], {**self.fixed, "pressure_delay": steps * self.h}, self.geo)
        starts = [None] * len(self.problem.trials)
        for j, i in enumerate(self.problem.nuisance):
            starts[i] = self.problem.trials[i].x0[2:4] + self.problem.sigma_p * z[self.k + 2 * j: self.k + 2 * j + 2]
        return values, starts

    def _blocks(self, z, steps):
        key = (steps, self.problem.horizon, self.problem.use_angle, z.tobytes())
        if key not in self._last:
            values, starts = self.split(z, steps)
            params = _apply(self.prior, values, self.geo)
            try:
                blocks = [self.problem.block(i, params, starts[i]) for i in range(len(self.problem.trials))]
            except SimulationDiverged:
                blocks = [np.full(n, _DIVERGED_RESIDUAL) for n in self.problem.sizes()]
            self._last = {key: blocks}
        return self._last[key]

    def fun(self, z, steps):
        return np.concatenate(self._blocks(z, steps))

    def jac(self, z, steps):
        """Forward differences with absolute steps ``step * max(1, |z|)`` (relative steps alone
        vanish at a parameter that starts at zero), stepping back at an upper bound; a trial's
        initial pressures change only that trial's block."""
        f0 = self._blocks(z, steps)
        sizes = [b.size for b in f0]
        offsets = np.concatenate([[0], np.cumsum(sizes)])
        out = np.zeros((offsets[-1], z.size))
        for c in range(z.size):
            dz = self.step * max(1.0, abs(z[c]))
            if z[c] + dz > self.upper[c]:
                dz = -dz
            zc = z.copy()
            zc[c] += dz
            dz = zc[c] - z[c]
            if c < self.k:
                values, starts = self.split(zc, steps)
                params = _apply(self.prior, values, self.geo)
                for i in range(len(f0)):
                    out[offsets[i]:offsets[i + 1], c] = (self._safe_block(i, params, starts[i]) - f0[i]) / dz
            else:
                i = self.problem.nuisance[(c - self.k) // 2]
                values, starts = self.split(zc, steps)
                params = _apply(self.prior, values, self.geo)
                out[offsets[i]:offsets[i + 1], c] = (self._safe_block(i, params, starts[i]) - f0[i]) / dz
        return out

    def _safe_block(self, i, params, p0):
        try:
            return self.problem.block(i, params, p0)
        except SimulationDiverged:
            return np.full(self.problem.sizes()[i], _DIVERGED_RESIDUAL)

    def start(self, values: dict, starts=None) -> np.ndarray:
        """Fit variables for parameter ``values`` and initial pressures ``starts`` (default logged)."""
        z = [self.coords.pack(values, self.geo)]
        for i in self.problem.nuisance:
            p = self.problem.trials[i].x0[2:4] if starts is None or starts[i] is None else starts[i]
            z.append((p - self.problem.trials[i].x0[2:4]) / self.problem.sigma_p)
        return np.clip(np.concatenate(z), self.lower, self.upper)

    def solve(self, steps: int, z0) -> _Inner:
        from scipy.optimize import least_squares

        if z0.size == 0:
            res = self.fun(z0, steps)
            values, starts = self.split(z0, steps)
            return _Inner(steps, z0, res, np.zeros((res.size, 0)), 5, np.zeros(0, dtype=int), values, starts)
        sol = least_squares(self.fun, z0, jac=self.jac, bounds=(self.lower, self.upper), method="trf",
                            x_scale="jac", ftol=1e-8, xtol=1e-8, gtol=1e-8, max_nfev=self.max_evaluations,
                            args=(steps,))
        # trust-region reflective keeps its iterates strictly inside: a variable within a hair of a
        # bound sits on it
        near = 1e-6 * np.maximum(1.0, np.abs(np.where(np.isfinite(self.lower), self.lower, 0.0)))
        on_lower = (sol.active_mask < 0) | (sol.x - self.lower <= near)
        on_upper = (sol.active_mask > 0) | (self.upper - sol.x <= near)
        z = np.where(on_lower, self.lower, np.where(on_upper, self.upper, sol.x))
        active = np.where(on_lower, -1, np.where(on_upper, 1, 0))
        values, starts = self.split(z, steps)
        return _Inner(steps, z, sol.fun, sol.jac, int(sol.status), active, values, starts)


# --- uncertainty and excitation ---------------------------------------------------------------------

def _covariance(jac: np.ndarray, s2: float, rcond: float = 1e-10) -> np.ndarray:
    """``s^2 (J^T J)^-1`` through the SVD of ``J``; a direction whose singular value is below
    ``rcond`` times the largest has unbounded variance (NaN wherever it enters)."""
    if jac.shape[1] == 0:
        return np.zeros((0, 0))
    _, sv, vt = np.linalg.svd(jac, full_matrices=False)
    top = sv[0] if sv.size and sv[0] > 0 else 1.0
    cov = np.zeros((vt.shape[1], vt.shape[1]))
    for k in range(sv.size):
        outer = np.outer(vt[k], vt[k])
        if sv[k] > rcond * top:
            cov += outer / sv[k] ** 2
        else:
            cov[np.abs(outer) > 1e-12] = np.nan
    return s2 * cov


def _parameter_stds(fit: _Inner, coords: _Coordinates, keep: list, s2: float, geo) -> dict:
    """One sigma of the continuous parameters in ``keep`` (a subset of ``coords.names``), the
    others held: from the Jacobian columns of ``keep`` and of the nuisance initial pressures, plus
    what the uncertainty of parameters fitted in an earlier stage carries into them
    (``dz = -J^+ J_c dc``, the first-order propagation through the least-squares solution)."""
    k = len(coords.names)
    idx = [coords.names.index(n) for n in keep]
    cols = idx + list(range(k, fit.jac.shape[1]))
    jac = fit.jac[:, cols]
    cov_full = _covariance(jac, s2)
    if fit.carried is not None and jac.shape[1]:
        moved = np.linalg.lstsq(jac, fit.carried[0], rcond=None)[0]
        cov_full = cov_full + (moved * fit.carried[1]) @ moved.T
    cov_z = cov_full[:len(idx), :len(idx)]
    T = coords.to_values(fit.z[:k], geo)[np.ix_(idx, idx)]
    with np.errstate(invalid="ignore"):
        cov = T @ cov_z @ T.T
    return {n: float(math.sqrt(cov[i, i])) if np.isfinite(cov[i, i]) and cov[i, i] >= 0 else math.nan
            for i, n in enumerate(keep)}


def _search_delay(solve, fits: dict, start: int, z0, max_steps: int) -> int:
    """Search the dead time over sub-step multiples for the least profile RSS (every other
    parameter fitted inside, warm-started from the nearest fit): ``start`` and its neighbours, one
    jump to the vertex of the parabola through them, then a walk downhill. Returns the best."""
    def rss(steps, warm):
        if steps not in fits:
            fits[steps] = solve(steps, warm)
        return fits[steps].rss

    best = start
    rss(best, z0)
    around = [d for d in (best - 1, best + 1) if 0 <= d <= max_steps]
    for d in around:
        rss(d, fits[best].z)
    if len(around) == 2:
        c_lo, c_0, c_hi = fits[best - 1].rss, fits[best].rss, fits[best + 1].rss
        curvature = c_lo + c_hi - 2.0 * c_0
        if curvature > 0:
            jump = int(round(best + 0.5 * (c_lo - c_hi) / curvature))
            jump = min(max(jump, best - 10, 0), best + 10, max_steps)
            if jump not in fits:
                near = min(fits, key=lambda d: abs(d - jump))
                rss(jump, fits[near].z)
    best = min(fits, key=lambda d: fits[d].rss)
    while True:
        # the neighbour on the side of the next-best fit first: the minimum lies between them
        others = [d for d in fits if d != best]
        toward = min(others, key=lambda d: fits[d].rss) if others else best + 1
        order = sorted((d for d in (best - 1, best + 1) if 0 <= d <= max_steps),
                       key=lambda d: (d - best) * (toward - best) < 0)
        for d in order:
            if rss(d, fits[best].z) < fits[best].rss:
                best = d
                break
        else:
            return best


def _delay_std(fits: dict, best: int, s2: float, h: float) -> float:
    """One sigma of the dead time [s]: the profile's curvature (``Delta RSS = s^2``, the
    profile-likelihood interval) and the rounding to sub-steps (uniform, ``h / sqrt(12)``)."""
    c0 = fits[best].rss
    lo, hi = fits.get(best - 1), fits.get(best + 1)
    if lo is not None and hi is not None:
        curvature = 0.5 * (lo.rss + hi.rss - 2.0 * c0)
    elif lo is not None or hi is not None:
        curvature = (lo or hi).rss - c0
    else:
        return math.nan
    if curvature <= 0:
        return math.nan
    return h * math.sqrt(s2 / curvature + 1.0 / 12.0)


def _excited(value, std, floor, tol) -> bool:
    return bool(np.isfinite(std) and std <= tol * max(abs(value), floor))


def _release(fit: _Inner, coords, s2, stds, floors, tol, fit_delay, geo) -> dict:
    """Parameters the data do not excite, with their one sigma when released: the delay by its
    profile; of the others the least trusted unexcited one, then again on the Jacobian without it,
    until the rest are excited. Returns name -> (std, note)."""
    out = {}
    if fit_delay and not _excited(fit.values["pressure_delay"], stds["pressure_delay"],
                                  floors["pressure_delay"], tol):
        out["pressure_delay"] = (stds["pressure_delay"], _why(stds["pressure_delay"]))
    names, now = list(coords.names), {n: stds[n] for n in coords.names}
    while names:
        bad = [n for n in names if not _excited(fit.values[n], now[n], floors[n], tol)]
        if not bad:
            break
        drop = max(bad, key=PARAMETERS.index)
        if drop == "payload_mass" and "payload_radius" in names:
            drop = "payload_radius"          # the radius goes before the mass it belongs to
        side = int(fit.active[coords.names.index(drop)])
        why = _why(now[drop]) if side == 0 else \
            f"not excited: pushed to its {'lower' if side < 0 else 'upper'} bound and too uncertain there"
        out[drop] = (now[drop], why)
        names.remove(drop)
        if drop == "payload_radius":          # the mass then rides at the fixed radius: judged after a refit
            break
        now = _parameter_stds(fit, coords, names, s2, geo)
    return out


def _why(std: float) -> str:
    if not np.isfinite(std):
        return "not excited: the data do not determine it"
    return "not excited: too uncertain for the data to tell"


# --- the identification -------------------------------------------------------------------------

def identify_prior(rollouts, prior: PlantParams, task, *, sensors=None, payload_radius: float | None = None,
                   gravity: bool | None = None, parameters=None, relative_tolerance: float = 0.25,
                   angle_noise: float | None = None, pressure_noise: float | None = None,
                   max_delay: float = 0.05, max_evaluations: int = 40) -> IdentificationResult:
    """Fit the prior's uncertain dynamic parameters to logged trials.

    When every trial logs both pressures and the prior's pressure model is the first-order lag
    (whose pressures do not depend on the motion), the fit runs in two stages: the pressure
    response (dead time, time constant) to the pressure residuals alone, then the mechanics to
    angle and pressures with that response. Otherwise all parameters are fitted together.

    Parameters
    ----------
    rollouts : sequence of :class:`~muscle_sim.records.Rollout`
        Logged trials on the task's control grid (time, measured angle, optionally rate and
        pressures; NaN pressures mean "not logged"), as ``pamjoint learn-step`` reads them. Each
        starts at rest, holding its initial pressures.
    prior : PlantParams
        The current prior model; the fit starts from it and unfitted fields stay as they are.
    task : StrikeTask
        Gives the control step and sub-steps the prior is simulated with.
    sensors : SensorParams, optional
        Noise levels (and pressure sensor lag) of the readings; floors of 0.01 deg and 0.5 kPa.
    payload_radius : float, optional
        Where the prior's payload rides from the pivot [m]; without it ``payload_mass`` is not fitted.
    gravity : bool, optional
        Whether the joint swings under gravity (default: whether the prior has a gravity torque).
    parameters : iterable of str, optional
        Which of :data:`PARAMETERS` to fit (default all).
    relative_tolerance : float
        A parameter whose one sigma exceeds this share of ``max(|value|, floor)`` is not excited.
    angle_noise, pressure_noise : float, optional
        Override the noise levels [rad], [Pa].
    max_delay : float
        Longest dead time the search tries [s].
    max_evaluations : int
        Evaluation limit of each inner least-squares fit (scipy's ``max_nfev``).

    Returns
    -------
    IdentificationResult
    """
    requested = list(PARAMETERS) if parameters is None else list(parameters)
    for name in requested:
        if name not in PARAMETERS:
            raise ParameterError(f"parameters: {name!r} is not allowed; must be one of {', '.join(PARAMETERS)}")
    if not (isinstance(relative_tolerance, (int, float)) and relative_tolerance > 0):
        raise ParameterError(f"relative_tolerance: {relative_tolerance!r} is not allowed; must be > 0")
    if not (isinstance(max_delay, (int, float)) and 0 <= max_delay <= 1.0):
        raise ParameterError(f"max_delay: {max_delay!r} s is not allowed; must be in [0, 1] s")
    trials = _trials(rollouts, task)
    geo = _geometry(prior, payload_radius, gravity)
    sigma_q, sigma_p = _noise_levels(sensors, angle_noise, pressure_noise)
    problem = _Problem(trials, task, sigma_q, sigma_p, sensors)
    base = _prior_values(prior, geo)
    floors = _floors(prior, trials, task, geo)

    # what the prior's structure cannot show at all
    structural = {}
    if geo.radius <= 0:
        for n in ("payload_mass", "payload_radius"):
            structural[n] = "not fitted: the prior's payload radius is 0 (set prior.payload_radius)"
    elif not geo.gravity:
        structural["payload_radius"] = "not excited: no gravity, so only m r^2 is seen, not r"
    elif "payload_mass" not in requested:
        structural["payload_radius"] = "not fitted: fitting the radius needs payload_mass fitted too"
    if prior.pneumatics.model != "lag":
        structural["pressure_time_constant"] = "not fitted: the prior's pressure model has no lag time constant"
    else:
        structural["sonic_conductance"] = "not fitted: the prior's pressure model (lag) has no valve flow"
    free = [n for n in PARAMETERS if n in requested and n not in structural]

    try:
        before = [problem.predict_one(i, prior) for i in range(len(trials))]
    except SimulationDiverged:
        return _failed(prior, geo, base, requested, structural, problem, -3)
    r_before = problem.residuals(prior)

    together = problem.nuisance != list(range(len(trials)))
    if together:
        stages = [("", free, True)]
    else:
        stages = [("pressure response", [n for n in free if n in _PRESSURE_PARAMETERS], False),
                  ("mechanics", [n for n in free if n not in _PRESSURE_PARAMETERS], True)]
    current, starts, outcomes, carry = prior, None, [], {}
    for label, names, use_angle in stages:
        if not names:
            continue
        problem.use_angle = use_angle
        stage = _fit_stage(problem, current, geo, floors, names, starts, relative_tolerance, max_delay,
                           max_evaluations, carry)
        problem.use_angle = True
        carry = {n: stage.stds[n] for n in stage.free if n != "pressure_delay" and np.isfinite(stage.stds[n])}
        current = _apply(current, {n: stage.fit.values[n] for n in stage.free}, geo)
        starts = stage.fit.starts
        outcomes.append((label, stage))
    return _result(prior, geo, base, requested, structural, outcomes, current, starts, problem, before, r_before)


_PRESSURE_PARAMETERS = ("pressure_delay", "pressure_time_constant", "sonic_conductance")


@dataclass
class _Stage:
    """What one stage of the fit ends with: the parameters still free (excited), those released
    (name -> (std, note)), the final inner fit, its coordinates and the parameters' one sigma."""

    free: list
    released: dict
    fit: _Inner
    coords: _Coordinates
    stds: dict


def _fit_stage(problem: _Problem, prior: PlantParams, geo, floors, names, starts, tol, max_delay,
               max_evaluations, carry: dict | None = None) -> _Stage:
    """Fit ``names`` (the dead time by the sub-step search, the rest by least squares inside),
    then release unexcited parameters and fit the rest again until all left are excited.
    ``carry`` (name -> one sigma) are continuous parameters an earlier stage fitted: their
    uncertainty is carried into this stage's."""
    task = problem.task
    h = task.dt / task.n_substeps
    base = _prior_values(prior, geo)
    max_steps = int(round(max_delay / h))
    d_prior = min(delay_substeps(prior, task.dt, task.n_substeps), max_steps)
    free = list(names)
    released, partners = _collinear(problem, prior, geo, base, floors, [n for n in free if n != "pressure_delay"],
                                    d_prior, starts, max_evaluations)
    free = [n for n in free if n not in released]
    values, steps = dict(base), d_prior
    cont = [n for n in free if n != "pressure_delay"]
    if problem.use_angle and cont:
        # warm up on the first quarter and half of each trial: an output-error fit over the whole
        # trial has local minima where a wrong force or inertia lets the swing run out of phase;
        # over a shorter horizon the error grows monotonically with the parameter error
        coords = _coordinates(cont, base, floors, geo, h)
        inner = _InnerFit(problem, prior, geo, coords, {n: base[n] for n in PARAMETERS if n not in cont}, h,
                          max_evaluations)
        for share in _WARM_UP:
            problem.horizon = share
            warm = inner.solve(steps, inner.start(values, starts))
            values, starts = warm.values, warm.starts
        problem.horizon = 1.0
    while True:
        cont = [n for n in free if n != "pressure_delay"]
        fit_delay = "pressure_delay" in free
        coords = _coordinates(cont, base, floors, geo, h)
        fixed = {n: base[n] for n in PARAMETERS if n not in cont}
        inner = _InnerFit(problem, prior, geo, coords, fixed, h, max_evaluations)
        z0 = inner.start(values, starts)
        fits: dict = {}
        if fit_delay:
            steps = _search_delay(inner.solve, fits, steps, z0, max_steps)
        else:
            steps = d_prior
            fits[steps] = inner.solve(steps, z0)
        fit = fits[steps]
        if carry:
            fit.carried = _carried_columns(problem, prior, geo, fit, carry)
        dof = max(fit.res.size - fit.z.size - int(fit_delay), 1)
        s2 = max(fit.rss / dof, 1.0)
        stds = _parameter_stds(fit, coords, cont, s2, geo)
        if fit_delay:
            stds["pressure_delay"] = _delay_std(fits, steps, s2, h)
        newly = _release(fit, coords, s2, stds, floors, tol, fit_delay, geo)
        released.update(newly)
        if not newly:
            return _Stage(free, released, fit, coords, stds)
        free = [n for n in free if n not in newly]
        # a parameter released only because it mirrored others comes back once they have all gone
        for n, mirrored in list(partners.items()):
            if all(m in released and m not in free for m in mirrored):
                free.append(n)
                del released[n], partners[n]
        free = [n for n in PARAMETERS if n in free]
        values = {**fit.values, **{n: base[n] for n in newly}}
        starts = fit.starts
        if "pressure_delay" in newly:
            steps = d_prior


def _carried_columns(problem, prior, geo, fit: _Inner, carry: dict, step: float = 1e-6):
    """Residual sensitivities (forward differences) to the parameters ``carry`` fitted in an
    earlier stage, and their variances."""
    cols = []
    for name in carry:
        value = fit.values[name]
        dv = step * abs(value)
        moved = problem.residuals(_apply(prior, {**fit.values, name: value + dv}, geo), fit.starts)
        cols.append((moved - fit.res) / dv)
    return np.column_stack(cols), np.array([carry[n] ** 2 for n in carry])


#: Shares of each trial the mechanics fit warms up on before the whole trial.
_WARM_UP = (0.25, 0.5)

#: Columns of the (column-normalised) Jacobian whose combination cancels to within this share are
#: collinear: the data cannot tell those parameters apart (a condition index of 1000, Belsley).
_COLLINEAR = 1e-3


def _collinear(problem, prior, geo, base, floors, names, steps, starts, max_evaluations) -> dict:
    """Parameters released before the fit because, at the prior, their effect on the residuals
    is nil or a combination of the others' (near-null direction of the normalised Jacobian); of
    each such direction the least trusted parameter goes. Returns ``(released, partners)``:
    name -> (std, note), and name -> the parameters it could not be told from."""
    if not names:
        return {}, {}
    h = problem.task.dt / problem.task.n_substeps
    coords = _coordinates(names, base, floors, geo, h)
    inner = _InnerFit(problem, prior, geo, coords, {n: base[n] for n in PARAMETERS if n not in names}, h,
                      max_evaluations)
    jac = inner.jac(inner.start(base, starts), steps)[:, :len(names)]
    keep, out, partners = list(names), {}, {}
    while keep:
        cols = jac[:, [names.index(n) for n in keep]]
        norms = np.linalg.norm(cols, axis=0)
        if np.any(norms == 0):
            drop = max((n for n, v in zip(keep, norms) if v == 0), key=PARAMETERS.index)
            out[drop] = (math.nan, "not excited: the data do not depend on it")
        else:
            _, sv, vt = np.linalg.svd(cols / norms, full_matrices=False)
            if sv[-1] >= _COLLINEAR * sv[0]:
                break
            involved = [n for n, v in zip(keep, vt[-1]) if abs(v) > 0.1]
            drop = max(involved, key=PARAMETERS.index)
            others = [n for n in involved if n != drop]
            out[drop] = (math.nan, f"not excited: the data cannot tell it from {', '.join(others)}")
            partners[drop] = others
        keep.remove(drop)
    return out, partners


def _rms(parts) -> float:
    parts = [np.asarray(p, dtype=float).ravel() for p in parts if p is not None]
    v = np.concatenate(parts) if parts else np.zeros(0)
    return float(np.sqrt(np.mean(v * v))) if v.size else math.nan


def _errors(problem: _Problem, preds) -> tuple:
    angle = _rms([y[1:, 0] - tr.angle for tr, y in zip(problem.trials, preds)])
    pressure = _rms([y[1:, 2:4] - tr.pressure if tr.pressure is not None else None
                     for tr, y in zip(problem.trials, preds)])
    return angle, pressure


def _failed(prior, geo, base, requested, notes, problem, status) -> IdentificationResult:
    params = {n: ParameterEstimate(n, float(base[n]), float(base[n]), math.nan, False, False,
                                   note=notes.get(n, "not fitted: " + STATUS_MESSAGES[status]))
              for n in requested}
    return IdentificationResult(False, status, STATUS_MESSAGES[status], params, prior, prior, math.nan, math.nan,
                                (math.nan, math.nan), (math.nan, math.nan), sum(problem.sizes()), problem.n_sim,
                                [STATUS_MESSAGES[status]], [], geo.radius, geo.gravity)


def _result(prior, geo, base, requested, structural, outcomes, identified, starts, problem, before,
            r_before) -> IdentificationResult:
    params, stuck, statuses = {}, [], []
    for label, stage in outcomes:
        fit, coords = stage.fit, stage.coords
        for n in stage.free:
            at_bound, note = False, ""
            if n in coords.names:
                side = int(fit.active[coords.names.index(n)])
                at_bound = side != 0
                if at_bound:
                    note = f"at its {'lower' if side < 0 else 'upper'} bound"
                    if not np.isfinite(stage.stds[n]):
                        stuck.append(n)
            params[n] = ParameterEstimate(n, float(base[n]), float(fit.values[n]), float(stage.stds[n]), True, True,
                                          at_bound, note)
        for n, (std, why) in stage.released.items():
            params[n] = ParameterEstimate(n, float(base[n]), float(base[n]), float(std), False, False, False, why)
        if stage.free:
            statuses.append((label, fit.status if coords.names else 5))
    for n in requested:
        if n not in params:
            params[n] = ParameterEstimate(n, base[n], base[n], math.nan, False, False, False,
                                          structural.get(n, "not fitted"))
    params = {n: params[n] for n in requested}
    warnings = [f"{n}: {p.note}" for n, p in params.items() if p.note and (not p.excited or p.at_bound)]
    after = [problem.predict_one(i, identified, None if starts is None else starts[i])
             for i in range(len(problem.trials))]
    r_after = problem.residuals(identified, starts)
    if not statuses:
        status, message = -2, STATUS_MESSAGES[-2]
    elif stuck:
        status, message = -1, f"{STATUS_MESSAGES[-1]}: {', '.join(stuck)}"
    else:
        status = min(code for _, code in statuses)
        message = "; ".join(f"{label}: {STATUS_MESSAGES[code].rstrip('.')}" if label else STATUS_MESSAGES[code]
                            for label, code in statuses)
    (a_before, p_before), (a_after, p_after) = _errors(problem, before), _errors(problem, after)
    return IdentificationResult(status >= 1, status, message, params, prior, identified, _rms([r_after]),
                                _rms([r_before]), (a_before, a_after), (p_before, p_after), r_after.size,
                                problem.n_sim, warnings, list(zip(before, after)), geo.radius, geo.gravity)


def _setup_geometry(setup) -> dict:
    """Payload radius and gravity of the prior as the setup's config states them."""
    cfg = setup.config
    radius = cfg.get("prior.payload_radius")
    if radius is None:
        radius = cfg.get("plant.joint.payload_radius")
    return {"payload_radius": radius, "gravity": cfg.get("plant.joint.hanging_angle") is not None}


#: Pressure laws a prior can take: the first-order regulator lag and the ISO 6358 valve flow
#: with the config's valve data (``plant.pneumatics``: sonic conductance, critical ratio, spool).
PRESSURE_LAWS = ("lag", "valve")
#: :func:`select_pressure_law` moves to the other law only when its fitted residual RMS is below
#: this share of the configured law's: a clear preference of the data, not a tie broken by noise.
LAW_PREFERENCE = 0.8


def with_pressure_law(prior: PlantParams, law: str) -> PlantParams:
    """``prior`` with its pressure law set to ``law`` (one of :data:`PRESSURE_LAWS`); every
    parameter, the dead time included, stays."""
    if law not in PRESSURE_LAWS:
        raise ParameterError(f"pressure_model: {law!r} is not allowed; must be one of {', '.join(PRESSURE_LAWS)}")
    if prior.pneumatics.model == law:
        return prior
    return PlantParams(prior.muscle, prior.joint, replace(prior.pneumatics, model=law))


def prior_from_values(setup, values: dict) -> PlantParams:
    """``setup.prior`` with the identified ``values`` (as kept in a learner state) put in; an entry
    ``pressure_model`` (see :func:`select_pressure_law`) sets the pressure law first."""
    values = dict(values or {})
    law = values.pop("pressure_model", None)
    prior = setup.prior if law is None else with_pressure_law(setup.prior, law)
    return apply_prior_values(prior, values, **_setup_geometry(setup)) if values else prior


def update_prior(setup, rollouts, prior: PlantParams | None = None, **options):
    """The learner's call: ``(updated prior, IdentificationResult)`` from the trials so far.

    ``prior`` defaults to ``setup.prior``; the payload radius, gravity and sensor noise come from
    the setup's config (``prior.payload_radius``, else ``plant.joint.payload_radius``; gravity when
    ``plant.joint.hanging_angle`` is set). Options are those of :func:`identify_prior`."""
    for key, value in _setup_geometry(setup).items():
        options.setdefault(key, value)
    options.setdefault("sensors", setup.sensors)
    result = identify_prior(list(rollouts), setup.prior if prior is None else prior, setup.task, **options)
    return updated_prior(result), result


def select_pressure_law(setup, rollouts, prior: PlantParams | None = None, **options):
    """Which pressure law the logged pressures support: ``(law, updated prior, result)``.

    The prior (default ``setup.prior``) is identified as it is and with the other law of
    :data:`PRESSURE_LAWS` (:func:`with_pressure_law`: the dead time and every mechanical value
    carried over). The other law is chosen only when, after its fit, the RMS error of the
    predicted pressures is below :data:`LAW_PREFERENCE` times that of the prior's own law: the
    law is what turns commands into pressures, so the pressure logs judge it (a proportional
    valve's pressures depend on the flow it can pass and on the muscle's volume, and can trail a
    fast command further than any first-order lag; a regulator answers like the lag). A plain
    output-error model choice on a common data set, common practice in system identification
    (Ljung 1999, System Identification, 2nd ed., ch. 16). Without logged pressures, or when the
    other law's fit did not run, the prior's own law stays; a fit that stopped at its evaluation
    limit still counts for the choice (its parameters are then not applied by the learner)."""
    prior = setup.prior if prior is None else prior
    own = prior.pneumatics.model
    other = next(law for law in PRESSURE_LAWS if law != own)
    fits = {}
    for law in (own, other):
        try:
            fits[law] = update_prior(setup, rollouts, with_pressure_law(prior, law), **options)
        except (ValueError, ArithmeticError):
            continue

    def pressure_error(law):
        fit = fits.get(law)
        return fit[1].pressure_rms[1] if fit is not None and fit[1].status >= 0 else math.nan

    e_own, e_other = pressure_error(own), pressure_error(other)
    if math.isfinite(e_other) and (not math.isfinite(e_own) or e_other < LAW_PREFERENCE * e_own):
        return (other, *fits[other])
    if own in fits:
        return (own, *fits[own])
    return own, prior, None


def config_snippet(result: IdentificationResult) -> str:
    """A ``prior:`` section with units to paste into a config: the excited parameters' values;
    the others as comments saying why they were kept."""
    keys = {"payload_mass": "{:.4g} kg", "payload_radius": "{:.4g} mm", "viscous_damping": "{:.4g} N m s/rad",
            "coulomb_torque": "{:.4g} N m", "pressure_time_constant": "{:.4g} ms",
            "pressure_delay": "{:.4g} ms", "force_scale": "{:.4g}", "sonic_conductance": "{:.4g} dm^3/(s bar)"}
    lines = ["# prior fitted by pamjoint identify (values +- one standard deviation)", "prior:"]
    for name, p in result.parameters.items():
        unit, scale = DISPLAY_UNITS[name]
        if p.excited:
            text = keys[name].format(p.value / scale)
            sd = f"+- {p.std / scale:.2g}" if np.isfinite(p.std) else "+- ?"
            lines.append(f"  {name}: {text}   # {sd} {unit}".rstrip())
        else:
            lines.append(f"  # {name}: kept at {keys[name].format(p.prior / scale)} ({p.note})")
    return "\n".join(lines) + "\n"
