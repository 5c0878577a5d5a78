"""Frozen dataclasses of physical parameters (SI units), validated on creation."""
from __future__ import annotations

import math
from dataclasses import dataclass, fields

from .errors import ParameterError

#: Braid angle at which an ideal McKibben muscle gives no force, arccos(1/sqrt(3)) [rad]
#: (Chou & Hannaford 1996; Tondu & Lopez 2000).
NEUTRAL_BRAID_ANGLE = math.acos(1.0 / math.sqrt(3.0))


def _fail(owner: str, name: str, value, allowed: str, unit: str = "") -> None:
    shown = f"{value:g}" if isinstance(value, (int, float)) else repr(value)
    unit = f" {unit}" if unit else ""
    raise ParameterError(f"{owner}.{name}: {shown}{unit} is not allowed; must be {allowed}")


def check_positive(owner: str, name: str, value: float, unit: str = "") -> None:
    """Raise ParameterError unless ``value`` is a finite number > 0."""
    if not (isinstance(value, (int, float)) and math.isfinite(value) and value > 0):
        _fail(owner, name, value, "a finite number > 0", unit)


def check_nonnegative(owner: str, name: str, value: float, unit: str = "") -> None:
    """Raise ParameterError unless ``value`` is a finite number >= 0."""
    if not (isinstance(value, (int, float)) and math.isfinite(value) and value >= 0):
        _fail(owner, name, value, "a finite number >= 0", unit)


def check_range(owner: str, name: str, value: float, low: float, high: float,
                unit: str = "", *, low_open: bool = False, high_open: bool = False) -> None:
    """Raise ParameterError unless ``low <= value <= high`` (ends optionally open)."""
    ok = isinstance(value, (int, float)) and math.isfinite(value)
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

    def __post_init__(self) -> None:
        own = type(self).__name__
        for f in fields(self):
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
