"""PID feedback on the joint angle -> differential pressure, with anti-windup; alone or on top of a
feedforward profile. Gains are placed on the PRIOR model linearised at home, pressure lag and dead
time included, for phase- and gain-margin targets, or set in the config's ``feedback`` section.

Sources: the loop's stability margins, read numerically off its frequency response, and the
target ranges (phase margin 30 to 60 deg, gain margin 2 to 5) are common practice (e.g. Astrom &
Murray 2008, Feedback Systems, on stability margins); the gains come from moving one point of the
Nyquist curve, the PID design for a phase margin at a chosen crossover (Astrom & Hagglund 1995,
PID Controllers: Theory, Design, and Tuning), with the crossover chosen for the largest integral
gain the margins allow (the criterion of Astrom, Panagopoulos & Hagglund 1998, Automatica 34(5));
closed-loop stability of the delayed loop is checked on Pade approximations of the delay
(Pade 1892; first-order sections in cascade).
"""
from __future__ import annotations

import functools
import math
from dataclasses import dataclass, replace

import numpy as np
from scipy.optimize import brentq

from muscle_sim.integrate import delay_steps
from muscle_sim.params import PlantParams
from muscle_sim.plant import initial_state, rhs
from muscle_sim.tasks import StrikeTask, reference

#: Integral corner of the placed PID as a share of its crossover: ``ki = INTEGRAL_CORNER kp w_c``
#: (common practice: the integral zero a factor 4 to 10 below the crossover costs little phase).
INTEGRAL_CORNER = 0.2
#: Highest crossover tried, as ``w_c dt``: sampled control keeps to ``w_c h`` of about 0.15 to 0.5
#: (common practice, e.g. Astrom & Wittenmark, Computer-Controlled Systems).
MAX_CROSSOVER_STEP = 0.3
#: Lowest crossover tried [rad/s].
MIN_CROSSOVER = 0.5
#: Length of one first-order Pade section of the delay in the stability check [s].
PADE_SECTION = 1e-3

_CANDIDATES = 240           # crossovers tried, log-spaced
_GRID = 3000                # frequencies of the margin search, log-spaced up to the Nyquist frequency


@dataclass(frozen=True)
class FeedbackSettings:
    """What the config's ``feedback`` section asks of the PID (SI units).

    ``proportional`` [Pa/rad], ``integral`` [Pa/(rad s)], ``derivative`` [Pa s/rad]: gains set by
    hand, ``None`` = placed. ``phase_margin`` [rad] and ``gain_margin`` [-]: targets of the placement.
    """

    proportional: float | None = None
    integral: float | None = None
    derivative: float | None = None
    phase_margin: float = math.radians(30.0)
    gain_margin: float = 2.0

    @classmethod
    def from_config(cls, cfg) -> "FeedbackSettings":
        """Settings of a loaded config's ``feedback`` section."""
        return cls(**cfg.get("feedback"))

    @property
    def set_by_hand(self) -> tuple:
        """Names of the gains the settings fix."""
        return tuple(n for n in ("proportional", "integral", "derivative") if getattr(self, n) is not None)


@dataclass(frozen=True)
class LoopModel:
    """The prior linearised at rest at home: ``dx/dt = A x + b d(t - T)``, angle ``= x[0]``.

    ``d`` is the differential pressure command (``+d`` on muscle A, ``-d`` on B) [Pa]; ``delay``
    ``T`` [s] is the prior's dead time on the simulator's sub-step grid plus half a control step
    for the zero-order hold (common practice). States that never move are dropped (the spools of
    the lag model).
    """

    a: np.ndarray
    b: np.ndarray
    delay: float

    def response(self, w) -> np.ndarray:
        """``G(jw)`` from ``d`` to the angle [rad/Pa] at angular frequencies ``w`` [rad/s], the delay
        evaluated exactly."""
        w = np.atleast_1d(np.asarray(w, dtype=float))
        n = self.a.shape[0]
        m = 1j * w[:, None, None] * np.eye(n) - self.a
        x = np.linalg.solve(m, np.broadcast_to(self.b.astype(complex), (w.size, n))[..., None])[..., 0]
        return x[:, 0] * np.exp(-1j * w * self.delay)


def linearise(prior: PlantParams, task: StrikeTask) -> LoopModel:
    """Central-difference linearisation of the prior's right-hand side (:func:`muscle_sim.plant.rhs`,
    the compiled kernel) at rest at home under the task's holding pressures.

    Dry friction (pivot Coulomb torque, braid friction) is left out: its smoothed slope at rest
    describes sticking, not a moving joint, and would add damping the swing does not see.
    """
    from muscle_sim.simulation import home_pressures

    params = replace(prior, joint=replace(prior.joint, coulomb_torque=0.0),
                     muscle=replace(prior.muscle, braid_friction=0.0))
    hold = np.array(home_pressures(params, task), dtype=float)
    x0 = initial_state(params, task.home_angle, hold)
    steps = np.array([1e-6, 1e-5, 10.0, 10.0, 1e-6, 1e-6])   # rad, rad/s, Pa, Pa, -, -
    plus = x0 + np.diag(steps)
    minus = x0 - np.diag(steps)
    a = ((rhs(0.0, plus, hold, params) - rhs(0.0, minus, hold, params)) / (2.0 * steps[:, None])).T
    du = 10.0
    b = (rhs(0.0, x0, hold + [du, -du], params) - rhs(0.0, x0, hold - [du, -du], params)) / (2.0 * du)
    keep = ~(np.all(a == 0.0, axis=1) & (b == 0.0))
    keep[0] = True
    h = task.dt / task.n_substeps
    delay = delay_steps(prior.pneumatics.delay, h) * h + 0.5 * task.dt
    return LoopModel(a[np.ix_(keep, keep)], b[keep], delay)


def pid_response(kp: float, ki: float, kd: float, w) -> np.ndarray:
    """``C(jw) = kp + ki / (jw) + kd jw`` [Pa/rad] (derivative on the measured rate, no filter)."""
    w = np.asarray(w, dtype=float)
    return kp + ki / (1j * w) + 1j * kd * w


@dataclass(frozen=True)
class LoopMargins:
    """Stability margins of ``L = C G`` (SI units): ``crossover`` [rad/s] is the gain crossover with
    the smallest ``phase_margin`` [rad] (``pi - |arg L|`` there); ``gain_margin`` the factor on the
    loop gain that reaches -1 first (inf: none), ``gain_reduction_margin`` the factor by which the
    gain may fall before a conditionally stable loop goes unstable (inf: never); ``stable`` whether
    the closed loop with the Pade-approximated delay has all poles in the left half plane,
    ``slowest_pole`` their largest real part [1/s]. The margins are distances of the Nyquist
    curve from -1: they mean robustness only where ``stable`` holds."""

    crossover: float
    phase_margin: float
    gain_margin: float
    gain_reduction_margin: float
    stable: bool
    slowest_pole: float


def loop_margins(model: LoopModel, kp: float, ki: float, kd: float, dt: float) -> LoopMargins:
    """Margins of the PID ``(kp, ki, kd)`` around ``model``, read off ``L(jw)`` on a log grid up
    to the Nyquist frequency ``pi / dt`` with each crossing refined by Brent's method."""
    w = np.logspace(math.log10(MIN_CROSSOVER / 10.0), math.log10(math.pi / dt), _GRID)
    g = model.response(w)

    def loop(x):
        return complex(pid_response(kp, ki, kd, x) * model.response(x)[0])

    values = pid_response(kp, ki, kd, w) * g
    log_mag = np.log(np.abs(values))
    crossover, phase_margin = math.nan, math.inf
    for i in np.nonzero(np.sign(log_mag[:-1]) != np.sign(log_mag[1:]))[0]:
        wc = brentq(lambda x: math.log(abs(loop(x))), w[i], w[i + 1], xtol=1e-10)
        pm = math.pi - abs(float(np.angle(loop(wc))))
        if pm < phase_margin:
            crossover, phase_margin = wc, pm
    upper, lower = math.inf, 0.0
    imag = values.imag
    for i in np.nonzero(np.sign(imag[:-1]) != np.sign(imag[1:]))[0]:
        wp = brentq(lambda x: loop(x).imag, w[i], w[i + 1], xtol=1e-10)
        point = loop(wp)
        if not (np.isfinite(point.real) and point.real < 0.0) or abs(point) > 1e9:
            continue            # a crossing of the positive axis, or through a pole on the jw axis
        if point.real > -1.0:
            upper = min(upper, -1.0 / point.real)
        else:
            lower = max(lower, -1.0 / point.real)
    slowest = float(closed_loop_poles(model, kp, ki, kd).real.max())
    return LoopMargins(crossover, phase_margin, upper, 1.0 / lower if lower > 0 else math.inf,
                       bool(slowest < 0.0), float(slowest))


def closed_loop_poles(model: LoopModel, kp: float, ki: float, kd: float) -> np.ndarray:
    """Poles [1/s] of the PID loop around ``model`` with the delay as a cascade of first-order Pade
    sections ``(1 - s h/2) / (1 + s h/2)``, ``h <= PADE_SECTION``.

    States: the model's, the Pade chain's and the integral of the error; the command is
    ``d = -kp q - kd qd + ki I`` with ``dI/dt = -q`` (reference zero).
    """
    a, b = model.a, model.b
    n = a.shape[0]
    sections = max(1, math.ceil(model.delay / PADE_SECTION)) if model.delay > 0 else 0
    # chain: section k has state z_k, input y_{k-1} (y_0 = command); y_k = (4/h) z_k - y_{k-1}
    az = np.zeros((sections, sections))
    bz = np.zeros(sections)
    out_c, out_d = np.zeros(sections), 1.0       # the chain's output y = out_c z + out_d u
    if sections:
        h = model.delay / sections
        for k in range(sections):
            az[k] = out_c
            bz[k] = out_d
            az[k, k] -= 2.0 / h
            out_c = -out_c
            out_c[k] += 4.0 / h
            out_d = -out_d
    gain = -(kp * np.eye(n)[0] + kd * a[0])      # d = gain . x + ki I  (qd = row 0 of A times x)
    size = n + sections + 1
    m = np.zeros((size, size))
    m[:n, :n] = a + out_d * np.outer(b, gain)
    m[:n, n:n + sections] = np.outer(b, out_c)
    m[:n, -1] = out_d * ki * b
    m[n:n + sections, :n] = np.outer(bz, gain)
    m[n:n + sections, n:n + sections] = az
    m[n:n + sections, -1] = ki * bz
    m[-1, 0] = -1.0
    return np.linalg.eigvals(m)


@dataclass(frozen=True)
class FeedbackDesign:
    """Gains of the PID and how they came about, in the manner of scipy's result objects.

    ``kp`` [Pa/rad], ``ki`` [Pa/(rad s)], ``kd`` [Pa s/rad]; ``margins`` of these gains on
    ``model``; ``success`` means they meet the settings' margin targets on a stable loop;
    ``status`` 0: placed and met, 1: some gains set by hand and the targets met, -1: the targets
    are not met (best effort: the stable design closest to them, or none).
    """

    kp: float
    ki: float
    kd: float
    margins: LoopMargins
    model: LoopModel
    settings: FeedbackSettings
    success: bool
    status: int
    message: str

    def to_dict(self) -> dict:
        """A JSON-ready summary in display units (bar, deg, Hz, ms)."""
        per_deg = 1e5 * 180.0 / math.pi
        m = self.margins
        return {"success": self.success, "status": self.status, "message": self.message,
                "proportional_bar_per_deg": float(self.kp / per_deg),
                "integral_bar_per_deg_s": float(self.ki / per_deg),
                "derivative_bar_s_per_deg": float(self.kd / per_deg), "set_by_config": list(self.settings.set_by_hand),
                "crossover_hz": m.crossover / (2 * math.pi) if math.isfinite(m.crossover) else None,
                "phase_margin_deg": math.degrees(m.phase_margin) if math.isfinite(m.phase_margin) else None,
                "gain_margin": m.gain_margin if math.isfinite(m.gain_margin) else None,
                "gain_reduction_margin": m.gain_reduction_margin if math.isfinite(m.gain_reduction_margin) else None,
                "stable_on_prior": m.stable,
                "target_phase_margin_deg": math.degrees(self.settings.phase_margin),
                "target_gain_margin": self.settings.gain_margin, "loop_delay_ms": self.model.delay * 1e3}


def _meets(m: LoopMargins, s: FeedbackSettings) -> bool:
    return (m.stable and m.phase_margin >= s.phase_margin - 1e-6 and m.gain_margin >= s.gain_margin
            and m.gain_reduction_margin >= s.gain_margin)


def _shortfall(m: LoopMargins, s: FeedbackSettings) -> float:
    """Minus the smallest ratio of an achieved margin to its target (log ratios for the gain
    margins): -1 where the targets are just met, smaller is closer to them."""
    return -min(m.phase_margin / s.phase_margin, math.log(m.gain_margin) / math.log(s.gain_margin),
                math.log(m.gain_reduction_margin) / math.log(s.gain_margin))


def _gains_at(model: LoopModel, wc: float, s: FeedbackSettings):
    """The PID with ``arg L(jw_c) = -pi + phase_margin`` and ``|L(jw_c)| = 1`` in the family
    ``ki = INTEGRAL_CORNER kp w_c`` (``C(jw_c) = kp + j (kd w_c - ki / w_c)``), the hand-set gains
    put in place of the constructed ones; None where it needs a negative gain or more than 90 deg
    of phase from the PID."""
    g = complex(model.response(wc)[0])
    theta = (s.phase_margin - np.angle(g)) % (2 * math.pi) - math.pi     # arg C(jw_c), in [-pi, pi)
    if abs(theta) >= 0.5 * math.pi:
        return None
    size = 1.0 / abs(g)                                                   # |C(jw_c)|
    kp = size * math.cos(theta) if s.proportional is None else s.proportional
    ki = INTEGRAL_CORNER * kp * wc if s.integral is None else s.integral
    imag = size * math.sin(theta)                                         # kd w_c - ki / w_c
    kd = (imag + ki / wc) / wc if s.derivative is None else s.derivative
    if kp < 0 or ki < 0 or kd < 0:
        return None
    return kp, ki, kd


@functools.lru_cache(maxsize=64)
def place_gains(prior: PlantParams, task: StrikeTask,
                settings: FeedbackSettings = FeedbackSettings()) -> FeedbackDesign:
    """PID gains for the prior's loop at home (see the module docstring for the method).

    Each crossover ``w_c`` on a log grid up to ``MAX_CROSSOVER_STEP / dt`` fixes the PID that puts
    ``L(jw_c)`` at the phase-margin target on the unit circle; of those whose margins, read off the
    whole frequency response, meet both targets on a stable loop, the one with the largest integral
    gain (then proportional gain) is kept. Gains the settings fix replace the constructed ones in
    every candidate (so only the others are placed, and the margins decide; with all three fixed
    the design only reports their margins). With no candidate meeting the targets the stable one
    closest to them is returned with ``success`` False, or zero gains when none is stable.
    """
    model = linearise(prior, task)
    dt = task.dt
    fixed = settings.set_by_hand
    if len(fixed) == 3:
        kp, ki, kd = settings.proportional, settings.integral, settings.derivative
        m = loop_margins(model, kp, ki, kd, dt)
        ok = _meets(m, settings)
        return FeedbackDesign(kp, ki, kd, m, model, settings, ok, 1 if ok else -1,
                              "gains set by the config; " + ("they meet the margin targets on the prior" if ok else
                                                             _missed(m, settings)))
    best, closest = None, None
    for wc in np.logspace(math.log10(MIN_CROSSOVER), math.log10(MAX_CROSSOVER_STEP / dt), _CANDIDATES):
        gains = _gains_at(model, wc, settings)
        if gains is None:
            continue
        m = loop_margins(model, *gains, dt)
        if not m.stable:
            continue
        if _meets(m, settings):
            if best is None or (gains[1], gains[0]) > (best[0][1], best[0][0]):
                best = (gains, m)
        elif closest is None or _shortfall(m, settings) < _shortfall(closest[1], settings):
            closest = (gains, m)
    how = "placed" if not fixed else f"{', '.join(fixed)} set by the config, the rest placed"
    if best is not None:
        (kp, ki, kd), m = best
        return FeedbackDesign(kp, ki, kd, m, model, settings, True, 0 if not fixed else 1,
                              f"{how} for a {math.degrees(settings.phase_margin):g} deg phase margin and a gain "
                              f"margin of {settings.gain_margin:g} on the prior at home (loop delay "
                              f"{model.delay * 1e3:.3g} ms)")
    if closest is not None:
        (kp, ki, kd), m = closest
        return FeedbackDesign(kp, ki, kd, m, model, settings, False, -1,
                              f"{how}: no PID meets the margin targets on the prior; closest stable design: "
                              + _missed(m, settings))
    zero = loop_margins(model, 0.0, 0.0, 0.0, dt)
    return FeedbackDesign(0.0, 0.0, 0.0, zero, model, settings, False, -1,
                          f"{how}: no stable PID found on the prior; feedback is off")


def _missed(m: LoopMargins, s: FeedbackSettings) -> str:
    if not m.stable:
        return f"the loop around the prior is unstable (slowest pole {m.slowest_pole:.3g} 1/s)"
    return (f"phase margin {math.degrees(m.phase_margin):.1f} deg (target {math.degrees(s.phase_margin):g}), "
            f"gain margin {m.gain_margin:.3g} and reduction margin {m.gain_reduction_margin:.3g} (target "
            f"{s.gain_margin:g})")


class PIDController:
    """``delta = kp e + ki int(e) + kd de/dt`` added to muscle A and taken from muscle B.

    ``e = r - angle``, ``de/dt = r' - rate`` from the measured angle and rate (readings
    [angle, rate, p_a, p_b]); commands ``base + (delta, -delta)`` clipped to [0, rated], where
    ``base`` is the feedforward row k (a :class:`PressureProfile` or a controller holding one as
    ``.profile``), else ``base_pressures`` [Pa], else the home-holding pressures of the prior the
    gains are placed on.

    Gains: ``kp`` [Pa/rad], ``ki`` [Pa/(rad s)], ``kd`` [Pa s/rad] given here win; else those the
    ``settings`` (default: the config's ``feedback`` section) set; the rest are placed by
    :func:`place_gains` on ``prior`` (default ``setup.prior``; e.g. a prior identified from logged
    trials), pressure lag and dead time included. :attr:`design` holds the outcome.

    Anti-windup: conditional integration (the error is integrated only while the output is not
    saturated in the direction the error would push it), and ``|ki I|`` is clamped to the rated
    pressure.
    """

    def __init__(self, kp=None, ki=None, kd=None, feedforward=None, base_pressures=None, name=None,
                 prior: PlantParams | None = None, settings: FeedbackSettings | None = None):
        self.gains = (kp, ki, kd)
        self.feedforward = feedforward
        self.base_pressures = base_pressures
        self.prior = prior
        self.settings = settings
        self.name = name or ("model-only+feedback" if feedforward is not None else "feedback")

    def reset(self, setup) -> None:
        from muscle_sim.simulation import home_pressures

        task = setup.task
        settings = self.settings if self.settings is not None else FeedbackSettings.from_config(setup.config)
        given = dict(zip(("proportional", "integral", "derivative"), self.gains))
        settings = replace(settings, **{k: v for k, v in given.items() if v is not None})
        prior = self.prior if self.prior is not None else setup.prior
        self.design = place_gains(prior, task, settings)
        self.kp, self.ki, self.kd = self.design.kp, self.design.ki, self.design.kd
        t = np.arange(task.n_steps) * task.dt
        self._r, self._rd, _ = reference(task, t)
        if self.feedforward is not None:
            profile = getattr(self.feedforward, "profile", self.feedforward)
            profile.check_grid(task.dt, task.n_steps, "feedforward")
            self._base = np.asarray(profile.commands, dtype=float)
        else:
            base = self.base_pressures if self.base_pressures is not None else home_pressures(prior, task)
            self._base = np.tile(np.asarray(base, dtype=float), (task.n_steps, 1))
        self._dt = task.dt
        self._top = setup.rated_pressure
        self._integral = 0.0
        self.integral_limit = self._top / max(self.ki, 1e-12)

    def command(self, k, t, reading):
        e = self._r[k] - reading[0]
        ed = self._rd[k] - reading[1]
        delta = self.kp * e + self.ki * self._integral + self.kd * ed
        base = self._base[k]
        ua, ub = base[0] + delta, base[1] - delta
        saturated = (ua > self._top or ub < 0.0) if e > 0 else (ua < 0.0 or ub > self._top)
        if not saturated:
            self._integral = min(max(self._integral + e * self._dt, -self.integral_limit), self.integral_limit)
        return min(max(ua, 0.0), self._top), min(max(ub, 0.0), self._top)
