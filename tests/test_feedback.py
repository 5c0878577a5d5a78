"""PID gains placed on the linearised prior with its pressure lag and dead time: the linear model,
the margins against an independent frequency response, closed-loop stability on the prior, a 4 m
tube on the plant, and gains set in the config."""
import dataclasses
import math

import numpy as np
import pytest
from scipy import signal
from scipy.interpolate import pade

from controllers.comparison import feedback_prior
from controllers.feedback import (FeedbackSettings, PIDController, closed_loop_poles, linearise, loop_margins,
                                  place_gains)
from controllers.feedforward import FeedforwardController, model_only_profile
from muscle_sim import config, muscle
from muscle_sim.joint import contractions
from muscle_sim.runs import run_trial
from muscle_sim.simulation import Setup, home_pressures

from conftest import demo_config


def _setup(**keys):
    """The demo with ``section__key`` entries replaced (``plant__sensors={}``: quiet sensors)."""
    return Setup.from_config(config.load(demo_config(**keys)))


def _slow_prior_setup(**keys):
    """Quiet sensors; a prior with a 25 ms dead time and some pivot damping."""
    return _setup(**{"plant__sensors": {}, "prior__pressure_delay": "25 ms",
                     "prior__viscous_damping": "0.05 N m s/rad", **keys})


def _closed_form(prior, task):
    """The lag prior at home written out (derived from the static muscle model): numerator and
    denominator of ``k_tau / ((tau s + 1)(J s^2 + c s + K))`` and the loop delay."""
    m, j = prior.muscle, prior.joint
    pa, pb = home_pressures(prior, task)
    eps_a, eps_b = contractions(j, m.rest_length, task.home_angle)
    k_tau = j.pulley_radius * float(muscle.effective_area(m, eps_a) + muscle.effective_area(m, eps_b))
    stiffness = j.pulley_radius ** 2 * float(muscle.stiffness(m, pa, eps_a) + muscle.stiffness(m, pb, eps_b))
    den = np.polymul([prior.pneumatics.lag_time_constant, 1.0], [j.total_inertia, j.viscous_damping, stiffness])
    # the dead time on the 1 ms sub-step grid plus half the 2 ms control step (zero-order hold)
    delay = round(prior.pneumatics.delay / 1e-3) * 1e-3 + 1e-3
    return np.array([k_tau]), den, delay


def _old_gains(prior, task):
    """The former rule: 6 Hz pole placement on the double integrator ``J qdd = k delta``, blind to
    the pressure lag and delay (kp = J w^2 / k, kd = 2 0.7 J w / k, ki = kp w / 10)."""
    m, j = prior.muscle, prior.joint
    eps_a, eps_b = contractions(j, m.rest_length, task.home_angle)
    k = j.pulley_radius * float(muscle.effective_area(m, eps_a) + muscle.effective_area(m, eps_b))
    w = 2 * math.pi * 6.0
    kp = j.total_inertia * w * w / k
    return kp, kp * w / 10.0, 2 * 0.7 * j.total_inertia * w / k


def test_the_linearised_prior_is_its_closed_form_with_lag_and_delay():
    setup = _slow_prior_setup()
    model = linearise(setup.prior, setup.task)
    num, den, delay = _closed_form(setup.prior, setup.task)
    w = np.logspace(0, 2.5, 12)
    _, rational = signal.freqs(num, den, w)
    # Reference: the closed form above evaluated by scipy.signal.freqs, the delay exactly; tolerance
    # 1e-6 relative (central differences of a smooth right-hand side, measured 1e-9).
    np.testing.assert_allclose(model.response(w), rational * np.exp(-1j * w * delay), rtol=1e-6)
    # Derived: 25 ms on the 1 ms sub-step grid plus half a control step.
    assert model.delay == pytest.approx(0.026, abs=1e-12)


def _independent_margins(num, den, delay, gains, w_max):
    """Phase margin [deg], gain margin and crossovers read off scipy.signal.freqs of the same loop on
    a dense grid (2e5 points), the delay applied exactly."""
    kp, ki, kd = gains
    w = np.logspace(-1, math.log10(w_max), 200_000)
    _, rational = signal.freqs(np.polymul([kd, kp, ki], num), np.polymul([1.0, 0.0], den), w)
    loop = rational * np.exp(-1j * w * delay)
    cross = np.nonzero(np.diff(np.sign(np.log(np.abs(loop)))))[0]
    margins = [180.0 - abs(math.degrees(np.angle(loop[i]))) for i in cross]
    axis = [i for i in np.nonzero(np.diff(np.sign(loop.imag)))[0] if -1.0 < loop[i].real < 0.0]
    gm = min((-1.0 / loop[i].real for i in axis), default=math.inf)
    worst = int(np.argmin(margins))
    return margins[worst], gm, w[cross[worst]]


@pytest.mark.parametrize("delay", ["6 ms", "25 ms"])
def test_placed_margins_match_an_independent_frequency_response(delay):
    setup = _slow_prior_setup(prior__pressure_delay=delay)
    design = place_gains(setup.prior, setup.task)
    assert design.success and design.status == 0
    num, den, loop_delay = _closed_form(setup.prior, setup.task)
    pm, gm, wc = _independent_margins(num, den, loop_delay, (design.kp, design.ki, design.kd),
                                      math.pi / setup.task.dt)
    # Reference: scipy.signal.freqs of the closed-form loop; tolerances from the grid spacing
    # (2e5 log-spaced points: 0.01 deg of phase, 0.5 % of the gain margin, 0.01 % of frequency).
    assert math.degrees(design.margins.phase_margin) == pytest.approx(pm, abs=0.01)
    assert design.margins.gain_margin == pytest.approx(gm, rel=5e-3)
    assert design.margins.crossover == pytest.approx(wc, rel=1e-4)
    # Common practice (defaults of the feedback section): 30 deg phase margin, gain margin 2.
    assert pm >= 30.0 - 0.01 and gm >= 2.0


def test_closed_loop_poles_match_a_pade_reference():
    setup = _slow_prior_setup()
    design = place_gains(setup.prior, setup.task)
    num, den, delay = _closed_form(setup.prior, setup.task)
    order = 6
    p, q = pade([(-1.0) ** k / math.factorial(k) for k in range(2 * order + 1)], order)   # e^-x ~ p/q
    scale = delay ** np.arange(order, -1, -1)
    pid = np.polymul([design.kd, design.kp, design.ki], num)
    characteristic = np.polyadd(np.polymul(np.polymul([1.0, 0.0], den), q.coeffs * scale),
                                np.polymul(pid, p.coeffs * scale))
    reference = np.sort_complex(np.roots(characteristic))[::-1][:3]
    poles = closed_loop_poles(linearise(setup.prior, setup.task), design.kp, design.ki, design.kd)
    got = np.sort_complex(poles)[::-1][:3]
    # Reference: roots of 1 + C G with scipy.interpolate.pade's (6, 6) approximant of the delay;
    # the module cascades first-order sections instead; tolerance 1e-3 relative on the three
    # rightmost poles (both approximants agree there to 1e-4).
    np.testing.assert_allclose(got.real, reference.real, rtol=1e-3)
    assert np.all(reference.real < 0) and design.margins.stable


class _Step(PIDController):
    """The PID with a step of 5 deg from home at 0.1 s as its reference."""

    def reset(self, setup):
        super().reset(setup)
        t = np.arange(setup.task.n_steps) * setup.task.dt
        self._r = setup.task.home_angle + np.where(t >= 0.1, math.radians(5.0), 0.0)
        self._rd = np.zeros_like(t)


def _step_errors(setup, controller):
    on_prior = dataclasses.replace(setup, plant=setup.prior)
    rollout, metrics = run_trial(on_prior, controller, 0, np.random.default_rng(0))
    n = rollout.t.size - 1
    return np.degrees(controller._r[:n] - rollout.measured[:n, 0]), metrics


def test_placed_pid_settles_a_step_on_the_prior_with_its_delay():
    setup = _slow_prior_setup(task__trial_length="2400 ms")
    errors, metrics = _step_errors(setup, _Step())
    assert metrics["fault"] is None
    after_step, last = errors[50:150], errors[-100:]
    # Derived (measured: 5 deg step, 0.17 deg left after 2.3 s, as the slowest closed-loop pole at
    # -1.36 1/s predicts, 0.2 deg): the error decays; bounds: below a fifth of the step at the end,
    # and the last 200 ms swing less than the 200 ms after the step.
    assert abs(errors[-1]) < 1.0
    assert np.ptp(last) < np.ptp(after_step)
    # The former placement, blind to the 25 ms dead time, drives the same prior into the end stop.
    _, old = _step_errors(setup, _Step(*_old_gains(setup.prior, setup.task)))
    assert old["fault"] is not None


def _grows(rollout) -> bool:
    """Whether the tracking error of the last 200 ms reaches half the largest error of the trial."""
    e = np.abs(rollout.reference - rollout.measured[:, 0])
    return bool(e[-100:].max() >= 0.5 * e.max())


def test_feedback_on_a_4_m_tube_does_not_grow_oscillations():
    setup = _setup(plant__pneumatics__tube_length="4 m", plant__pneumatics__valve_dead_time="10 ms")
    ff = model_only_profile(setup)
    logged, _ = run_trial(setup, FeedforwardController(ff), 0, np.random.default_rng(0))
    prior, note = feedback_prior(setup, [logged])
    assert note["prior"] == "identified" and note["identification"]["success"]
    # Derived: 4 m / 343 m/s + 10 ms = 21.7 ms of dead time on the plant; the configured prior
    # believes 6 ms; the identified one must see most of it (bound 15 ms).
    assert prior.pneumatics.delay > 0.015 > setup.prior.pneumatics.delay
    for feedforward in (None, ff):
        rollout, metrics = run_trial(setup, PIDController(feedforward=feedforward, prior=prior), 0,
                                     np.random.default_rng(0))
        # measured: no fault, the last 200 ms within 40 % (alone) and 21 % (on the feedforward)
        # of the largest error; bound 50 %
        assert metrics["fault"] is None and not _grows(rollout)
        # The former placement on the configured prior swings into the end stop (measured: the
        # error grows to 66 deg alone, 48 deg on the feedforward, within 0.45 s).
        old = PIDController(*_old_gains(setup.prior, setup.task), feedforward=feedforward)
        rollout, metrics = run_trial(setup, old, 0, np.random.default_rng(0))
        assert metrics["fault"] is not None and _grows(rollout)


def test_gains_from_the_config_are_used_and_their_margins_reported():
    per_deg = 1e5 * 180.0 / math.pi       # 1 bar/deg in Pa/rad (exact unit definitions)
    setup = _setup(feedback={"proportional": "0.02 bar/deg", "integral": "0.1 bar/(deg s)",
                             "derivative": "2 bar ms/deg"})
    pid = PIDController()
    pid.reset(setup)
    # Reference: the unit definitions (1 bar = 1e5 Pa, 1 deg = pi/180 rad); tolerance 1e-12.
    assert (pid.kp, pid.ki, pid.kd) == pytest.approx((0.02 * per_deg, 0.1 * per_deg, 0.002 * per_deg), rel=1e-12)
    d = pid.design
    assert d.status in (1, -1) and d.settings.set_by_hand == ("proportional", "integral", "derivative")
    again = loop_margins(linearise(setup.prior, setup.task), pid.kp, pid.ki, pid.kd, setup.task.dt)
    assert d.margins == again and d.to_dict()["set_by_config"] == ["proportional", "integral", "derivative"]
    # Arguments win over the config.
    pid = PIDController(kp=1e4)
    pid.reset(setup)
    assert (pid.kp, pid.ki) == (1e4, pytest.approx(0.1 * per_deg, rel=1e-12))


def test_one_gain_set_the_others_placed_for_a_stricter_margin():
    setup = _setup(feedback={"proportional": "0.005 bar/deg", "phase_margin": "45 deg", "gain_margin": 3})
    pid = PIDController()
    pid.reset(setup)
    d = pid.design
    assert pid.kp == pytest.approx(0.005 * 1e5 * 180 / math.pi, rel=1e-12)
    assert d.success and d.status == 1 and d.settings.set_by_hand == ("proportional",)
    # Config targets: 45 deg and 3, met on a stable loop.
    assert d.margins.stable and math.degrees(d.margins.phase_margin) >= 45.0 - 1e-6
    assert d.margins.gain_margin >= 3.0 and d.margins.gain_reduction_margin >= 3.0


def test_unreachable_margins_give_the_closest_stable_design_and_say_so():
    setup = _slow_prior_setup(feedback={"phase_margin": "89 deg", "gain_margin": 20})
    d = place_gains(setup.prior, setup.task, FeedbackSettings.from_config(setup.config))
    assert not d.success and d.status == -1 and "no PID meets the margin targets" in d.message
    assert d.margins.stable and d.kp > 0
