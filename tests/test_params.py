"""Parameter validation: bad values are rejected with the field named."""
import math

import pytest

from muscle_sim.errors import ParameterError
from muscle_sim.params import McKibbenParams

GOOD = dict(rest_length=0.25, rest_radius=0.008, rest_braid_angle=math.radians(22))


@pytest.mark.parametrize("field, value", [
    ("rest_length", 0.0), ("rest_length", -0.1), ("rest_radius", -0.001), ("rest_radius", float("nan")),
    ("rest_braid_angle", math.acos(1 / math.sqrt(3))),   # neutral angle: cannot contract
    ("rest_braid_angle", math.radians(60)), ("rest_braid_angle", 0.0),
    ("wall_thickness", 0.008), ("wall_thickness", -1e-4),   # as thick as the radius
    ("end_correction", 0.9), ("rated_pressure", 0.0), ("braid_friction", -0.1),
    ("rest_length", "250 mm"), ("rest_length", True),
])
def test_invalid_parameters_name_the_field(field, value):
    with pytest.raises(ParameterError, match=rf"McKibbenParams\.{field}: "):
        McKibbenParams(**{**GOOD, field: value})


def test_valid_parameters_are_frozen():
    p = McKibbenParams(**GOOD)
    with pytest.raises(Exception):
        p.rest_length = 1.0  # type: ignore[misc]
    assert p.neutral_diameter == pytest.approx(2 * 0.008 / math.sin(math.radians(22)))
