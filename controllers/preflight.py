"""Checks of a pressure profile before it goes to hardware: pressure limits, pressure rate, and
what the prior model predicts it does (stop margin, faults, the strike), plus a reduced-pressure
copy for first runs."""
from __future__ import annotations

import math
from dataclasses import replace

import numpy as np

from muscle_sim import safety
from muscle_sim.runs import run_trial
from muscle_sim.sensors import SensorParams

from .base import PressureProfile
from .simple import ReplayProfile


def _on_prior(setup):
    """The setup with the prior as the plant, read by noiseless sensors: what the model predicts."""
    return replace(setup, plant=setup.prior, sensors=SensorParams())


def reduced(profile: PressureProfile, share: float) -> PressureProfile:
    """The profile with every command scaled by ``share`` (0 < share <= 1): a first run at
    reduced pressure, as the safety practice of pneumatic rigs recommends."""
    if not 0.0 < share <= 1.0:
        raise ValueError(f"--reduce-to: {share:g} is not allowed; must be > 0 and <= 1")
    return PressureProfile(profile.t.copy(), profile.commands * share,
                           metadata={**profile.metadata, "reduced_to": share})


def preflight(setup, profile: PressureProfile, max_rate: float | None = None,
              margin: float | None = None) -> dict:
    """Findings on ``profile`` for ``setup``'s rig (SI inside, display units in the result).

    ``max_rate`` [Pa/s] bounds the command rate (None: reported only); ``margin`` [rad] is the
    least predicted distance to an end stop (default: the learner's ``learning.angle_margin``).
    ``passed`` holds when no sample asks above the rated pressure, the rate is within its bound,
    and the prior predicts neither a fault nor a swing closer to a stop than the margin.
    """
    task = setup.task
    profile.check_grid(task.dt, task.n_steps, "profile")
    margin = setup.config.get("learning.angle_margin") if margin is None else margin
    rated, supply = setup.rated_pressure, setup.plant.pneumatics.supply_pressure
    u = np.asarray(profile.commands, dtype=float)
    rate = np.abs(np.diff(u, axis=0)) / task.dt if u.shape[0] > 1 else np.zeros((0, 2))
    peak_rate = float(rate.max()) if rate.size else 0.0
    rollout, metrics = run_trial(_on_prior(setup), ReplayProfile(profile, name="preflight"), 0,
                                 np.random.default_rng(0))
    angle = rollout.measured[:, 0]
    j = setup.prior.joint
    stop_margin = float(min(np.min(angle - j.lower_stop), np.min(j.upper_stop - angle)))
    findings = []
    above_rated = int(np.count_nonzero(u > rated))
    if above_rated:
        findings.append(f"{above_rated} sample(s) above the rated pressure {rated / 1e5:g} bar "
                        f"(peak {u.max() / 1e5:.3g} bar)")
    above_supply = int(np.count_nonzero(u > supply))
    if above_supply and not above_rated:
        findings.append(f"{above_supply} sample(s) above the supply {supply / 1e5:g} bar: the valves cannot "
                        f"give them")
    if max_rate is not None and peak_rate > max_rate:
        findings.append(f"command rate {peak_rate / 1e5:.4g} bar/s above the bound {max_rate / 1e5:g} bar/s")
    if metrics["fault"]:
        findings.append(f"the prior predicts a fault: {metrics['fault']}")
    elif stop_margin < margin:
        findings.append(f"the prior predicts the swing {math.degrees(stop_margin):.2f} deg from an end stop, "
                        f"closer than the margin {math.degrees(margin):g} deg")
    return {"passed": not findings, "findings": findings,
            "peak_command_kpa": float(u.max()) / 1e3, "samples_above_rated": above_rated,
            "samples_above_supply": above_supply, "peak_rate_bar_per_s": peak_rate / 1e5,
            "max_rate_bar_per_s": None if max_rate is None else max_rate / 1e5,
            "predicted": {"stop_margin_deg": math.degrees(stop_margin), "fault": metrics["fault"],
                          "rms_error_deg": metrics["rms_error_deg"],
                          "strike_angle_error_deg": metrics["strike_angle_error_deg"],
                          "strike_speed_error_pct": metrics["strike_speed_error_pct"],
                          "peak_pressure_kpa": metrics["peak_pressure_kpa"]},
            "rated_pressure_bar": rated / 1e5, "supply_pressure_bar": supply / 1e5,
            "safety": safety.GENERAL + " " + safety.HARDWARE}
