"""Frozen dataclasses of physical parameters (SI units), validated on creation."""
from __future__ import annotations

import math
import numbers
from dataclasses import dataclass, fields

from .errors import ParameterError

#: Braid angle at which an ideal McKibben muscle gives no force, arccos(1/sqrt(3)) [rad]
#: (Chou & Hannaford 1996; Tondu & Lopez 2000).
NEUTRAL_BRAID_ANGLE = math.acos(1.0 / math.sqrt(3.0))

#: Braid friction laws of a muscle: the tanh-smoothed Coulomb law (Tondu 2012) or Maxwell-slip
#: elements (Vo-Minh et al. 2011, :mod:`muscle_sim.hysteresis`).
FRICTION_MODELS = ("tanh", "maxwell-slip")


def _fail(owner: str, name: str, value, allowed: str, unit: str = "") -> None:
    shown = f"{value:g}" if isinstance(value, (int, float)) else repr(value)
    unit = f" {unit}" if unit else ""
    raise ParameterError(f"{owner}.{name}: {shown}{unit} is not allowed; must be {allowed}")


def check_positive(owner: str, name: str, value: float, unit: str = "") -> None:
    """Raise ParameterError unless ``value`` is a finite number > 0."""
    if not (isinstance(value, (int, float)) and math.isfinite(value) and value > 0):
        _fail(owner, name, value, "a finite number > 0", unit)


def check_range(owner: str, name: str, value: float, low: float, high: float,
                unit: str = "", *, low_open: bool = False, high_open: bool = False) -> None:
    """Raise ParameterError unless ``low <= value <= high`` (ends optionally open)."""
    ok = isinstance(value, (int, float)) and (math.isfinite(value) or (value == high == math.inf))
    if ok:
        ok = (value > low if low_open else value >= low) and (value < high if high_open else value <= high)
    if not ok:
        lo = "(" if low_open else "["
        hi = ")" if high_open else "]"
        _fail(owner, name, value, f"in {lo}{low:g}, {high:g}{hi}", unit)


@dataclass(frozen=True)
class McKibbenParams:
    """Geometry and corrections of one McKibben muscle (SI units).

    Attributes
    ----------
    rest_length : float
        Active length ``l0`` at zero pressure and zero contraction [m].
    rest_radius : float
        Braid radius at rest ``r0`` (Tondu & Lopez 2000); the bladder wall lies inside it [m].
    rest_braid_angle : float
        Braid angle ``alpha0`` from the long axis at rest [rad]; must be below the neutral angle
        arccos(1/sqrt(3)) = 54.7356 deg, else the muscle cannot contract.
    wall_thickness : float
        Bladder wall thickness ``t`` for the Chou & Hannaford (1996) thick-wall correction [m].
    end_correction : float
        Tondu & Lopez (2000) end-effect factor ``k >= 1``: contraction ``eps`` acts as ``k eps``.
    rated_pressure : float
        Highest gauge pressure the muscle is rated for [Pa].
    threshold_pressure : float
        Gauge pressure taken up by the bladder before the braid pulls (simplified bladder
        elasticity after Klute & Hannaford 2000) [Pa].
    braid_friction : float
        Thread-on-thread friction as a fraction of ``pi r0^2 P`` (Tondu 2012 review) [-].
    friction_rate_scale : float
        Contraction rate at which the smoothed (tanh) friction reaches 76 % of its level [1/s].
    force_scale : float
        Multiplier on the pulling force [-]: 1 for the model as written; a prior identified from
        trials uses it to absorb a force-model error (measured McKibben forces fall short of the
        inelastic-braid law, e.g. Tondu & Lopez 2000, Fig. 6).
    friction_model : str
        ``"tanh"``: braid friction as a smoothed Coulomb force against the contraction rate;
        ``"maxwell-slip"``: as Maxwell-slip elements, a rate-independent hysteresis loop of the
        same level ``braid_friction * pi r0^2 P`` (:mod:`muscle_sim.hysteresis`).
    friction_elements : int
        Number of Maxwell-slip elements ``M`` (1..64) [-].
    slip_length : float
        Stretch of the braid after which the full Maxwell-slip friction has developed; element i
        breaks away at ``slip_length * i / M`` [m].
    """

    rest_length: float
    rest_radius: float
    rest_braid_angle: float
    wall_thickness: float = 0.0
    end_correction: float = 1.0
    rated_pressure: float = 6e5
    threshold_pressure: float = 0.0
    braid_friction: float = 0.0
    friction_rate_scale: float = 0.05
    force_scale: float = 1.0
    friction_model: str = "tanh"
    friction_elements: int = 8
    slip_length: float = 1e-3

    def __post_init__(self) -> None:
        own = type(self).__name__
        if self.friction_model not in FRICTION_MODELS:
            _fail(own, "friction_model", self.friction_model, "one of " + ", ".join(FRICTION_MODELS))
        n = self.friction_elements
        if isinstance(n, bool) or not isinstance(n, numbers.Integral) or not 1 <= n <= 64:
            _fail(own, "friction_elements", n, "a whole number in [1, 64]")
        for f in fields(self):
            if f.name in ("friction_model", "friction_elements"):
                continue
            value = getattr(self, f.name)
            if isinstance(value, bool) or not isinstance(value, (int, float)):
                _fail(own, f.name, value, "a number")
        check_positive(own, "rest_length", self.rest_length, "m")
        check_positive(own, "rest_radius", self.rest_radius, "m")
        check_range(own, "rest_braid_angle", self.rest_braid_angle, 0.0, NEUTRAL_BRAID_ANGLE, "rad",
                    low_open=True, high_open=True)
        check_range(own, "wall_thickness", self.wall_thickness, 0.0, self.rest_radius, "m",
                    high_open=True)
        check_range(own, "end_correction", self.end_correction, 1.0, 10.0)
        check_positive(own, "rated_pressure", self.rated_pressure, "Pa")
        check_range(own, "threshold_pressure", self.threshold_pressure, 0.0, self.rated_pressure, "Pa",
                    high_open=True)
        check_range(own, "braid_friction", self.braid_friction, 0.0, 1.0)
        check_positive(own, "friction_rate_scale", self.friction_rate_scale, "1/s")
        check_range(own, "force_scale", self.force_scale, 0.05, 20.0)
        check_positive(own, "slip_length", self.slip_length, "m")
        if self.slip_length > self.rest_length:
            _fail(own, "slip_length", self.slip_length, f"<= rest_length ({self.rest_length:g} m)", "m")
        # the braid widens as it contracts, so a wall thinner than r0 fits at every contraction;
        # but the wall must leave a pulling area at rest (Chou & Hannaford 1996 thick-wall form)
        c, s = math.cos(self.rest_braid_angle), math.sin(self.rest_braid_angle)
        d0, t = self.neutral_diameter, self.wall_thickness
        rest_area = 0.25 * math.pi * d0 * d0 * (3 * c * c - 1) + math.pi * (d0 * t * (2 * s - 1 / s) - t * t)
        if rest_area <= 0.0:
            _fail(own, "wall_thickness", self.wall_thickness,
                  "thin enough to leave a pulling area at rest (try a smaller wall or braid angle)", "m")

    @property
    def neutral_diameter(self) -> float:
        """Braid diameter at a 90 deg braid angle, ``D0 = 2 r0 / sin(alpha0)`` [m]."""
        return 2.0 * self.rest_radius / math.sin(self.rest_braid_angle)


def _validate(obj, spec: dict) -> None:
    """Check numeric fields of ``obj`` against ``spec``: name -> (low, high, unit, low_open)."""
    own = type(obj).__name__
    for name, (low, high, unit, low_open) in spec.items():
        value = getattr(obj, name)
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            _fail(own, name, value, "a number", unit)
        check_range(own, name, value, low, high, unit, low_open=low_open)


_INF = math.inf


@dataclass(frozen=True)
class JointParams:
    """Antagonistic pulley joint (SI units). Angle ``q`` is positive when muscle A shortens.

    Attributes
    ----------
    pulley_radius : float
        Radius the muscle cables wind on ``r_p`` [m].
    pre_contraction : float
        Contraction of both muscles at ``q = 0`` [-].
    inertia : float
        Moment of inertia of the paddle about the pivot [kg m^2].
    payload_inertia : float
        Extra inertia of a payload riding on the paddle [kg m^2].
    gravity_moment : float
        ``m g l_c`` of paddle plus payload [N m]; gravity torque ``-m g l_c sin(q + gravity_offset)``.
    gravity_offset : float
        Angle between ``q = 0`` and the hanging-down position [rad].
    viscous_damping : float
        Viscous friction at the pivot [N m s/rad].
    coulomb_torque : float
        Dry friction level at the pivot [N m], smoothed as ``tanh(qd / coulomb_rate_scale)``.
    coulomb_rate_scale : float
        Rate that smooths the dry friction sign [rad/s].
    lower_stop, upper_stop : float
        Angles where the rubber end stops begin [rad].
    stop_stiffness : float
        End-stop spring rate [N m/rad].
    stop_damping : float
        Hunt–Crossley end-stop damping per unit penetration [N m s/rad^2].
    """

    pulley_radius: float
    pre_contraction: float
    inertia: float
    payload_inertia: float = 0.0
    gravity_moment: float = 0.0
    gravity_offset: float = 0.0
    viscous_damping: float = 0.0
    coulomb_torque: float = 0.0
    coulomb_rate_scale: float = 0.05
    lower_stop: float = -math.pi / 4
    upper_stop: float = math.pi / 4
    stop_stiffness: float = 2000.0
    stop_damping: float = 50.0

    def __post_init__(self) -> None:
        _validate(self, {
            "pulley_radius": (0, _INF, "m", True), "pre_contraction": (0, 0.5, "", False),
            "inertia": (0, _INF, "kg m^2", True), "payload_inertia": (0, _INF, "kg m^2", False),
            "gravity_moment": (0, _INF, "N m", False), "gravity_offset": (-math.pi, math.pi, "rad", False),
            "viscous_damping": (0, _INF, "N m s/rad", False), "coulomb_torque": (0, _INF, "N m", False),
            "coulomb_rate_scale": (0, _INF, "rad/s", True), "lower_stop": (-math.pi, 0, "rad", False),
            "upper_stop": (0, math.pi, "rad", False), "stop_stiffness": (0, _INF, "N m/rad", False),
            "stop_damping": (0, _INF, "N m s/rad^2", False)})

    @property
    def total_inertia(self) -> float:
        """Paddle plus payload inertia [kg m^2]."""
        return self.inertia + self.payload_inertia


PRESSURE_MODELS = ("valve", "lag")


@dataclass(frozen=True)
class PneumaticParams:
    """Supply, valves, tubes and chambers of both muscles (SI units; pressures gauge).

    ``model="valve"``: a proportional pressure valve per muscle whose spool (first-order lag,
    ``valve_time_constant``) is driven by its inner loop ``gain * (p_cmd - p) / 1 bar`` and meters
    ISO 6358 flow from supply or to exhaust. ``model="lag"``: the first-order regulator
    ``lag_time_constant dp/dt = p_cmd - p`` (the usual prior model). Both see the command after
    ``delay`` (tube transport plus valve dead time).
    """

    supply_pressure: float
    model: str = "valve"
    atmosphere: float = 101325.0
    temperature: float = 293.15
    sonic_conductance: float = 1.5e-8
    critical_ratio: float = 0.3
    subsonic_index: float = 0.5
    valve_time_constant: float = 0.002
    valve_gain: float = 4.0
    dead_volume: float = 2.5e-5
    k_in: float = 1.4
    k_out: float = 1.0
    k_chamber: float = 1.2
    delay: float = 0.0
    lag_time_constant: float = 0.02
    max_pressure_rate: float = _INF

    def __post_init__(self) -> None:
        if self.model not in PRESSURE_MODELS:
            _fail(type(self).__name__, "model", self.model, "one of " + ", ".join(PRESSURE_MODELS))
        _validate(self, {
            "supply_pressure": (0, _INF, "Pa", True), "atmosphere": (0, _INF, "Pa", True),
            "temperature": (0, _INF, "K", True), "sonic_conductance": (0, _INF, "m^3/(s Pa)", True),
            "critical_ratio": (0, 0.99, "", False), "subsonic_index": (0.1, 1.0, "", False),
            "valve_time_constant": (0, _INF, "s", True), "valve_gain": (0, _INF, "", True),
            "dead_volume": (0, _INF, "m^3", False), "k_in": (1, 1.4, "", False),
            "k_out": (1, 1.4, "", False), "k_chamber": (1, 1.4, "", False), "delay": (0, 1, "s", False),
            "lag_time_constant": (0, _INF, "s", True), "max_pressure_rate": (0, _INF, "Pa/s", True)})


@dataclass(frozen=True)
class PlantParams:
    """Everything the plant's right-hand side needs: muscles, joint, pneumatics."""

    muscle: McKibbenParams
    joint: JointParams
    pneumatics: PneumaticParams

    def __post_init__(self) -> None:
        eps0 = self.joint.pre_contraction
        from .muscle import max_contraction  # local: muscle imports params

        eps_max = max_contraction(self.muscle)
        if eps0 >= eps_max:
            _fail("JointParams", "pre_contraction", eps0, f"< {eps_max:g} (the muscle's maximum contraction)")
        travel = self.joint.pulley_radius * max(abs(self.joint.lower_stop), self.joint.upper_stop)
        if eps0 - travel / self.muscle.rest_length <= 0.0:
            # the muscle on the far side goes slack before the stop: it can neither pull nor hold
            _fail("JointParams", "pre_contraction", eps0,
                  f"> {travel / self.muscle.rest_length:.3g} (pulley travel to the farther stop over the rest "
                  f"length), so both muscles stay taut over the whole stop range")
        if eps0 + travel / self.muscle.rest_length >= eps_max:
            _fail("JointParams", "pulley_radius", self.joint.pulley_radius,
                  f"small enough that the muscle's contraction at the stops stays below {eps_max:g} "
                  f"(now {eps0 + travel / self.muscle.rest_length:.3g})", "m")
