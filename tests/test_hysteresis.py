"""Maxwell-slip braid hysteresis: the defining properties of the elasto-slide element law.

Exact checks run on lengths of a binary grid (multiples of 2**-20 m) with a binary slip length
(2**-10 m) and power-of-two element counts: every sum of the law is then exact in float64, so
"exact" means the law itself and not rounding luck.
"""
import math

import numba
import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from muscle_sim import hysteresis, muscle
from muscle_sim.errors import DataError, ParameterError
from muscle_sim.params import McKibbenParams

GRID = 2.0 ** -20            # length grid [m], about 1 micrometre
SLIP = 2.0 ** -10            # binary slip length [m], about 0.98 mm
REST = 0.25                  # rest length [m]; lengths are REST + GRID * integer
POWERS_OF_TWO = [1, 2, 4, 8, 16, 32, 64]
SETTINGS = settings(max_examples=150, deadline=None)


def braid(n_elements=8, slip_length=SLIP, braid_friction=0.03, threshold=1e4, r0=0.008):
    return McKibbenParams(rest_length=REST, rest_radius=r0, rest_braid_angle=math.radians(22),
                          threshold_pressure=threshold, braid_friction=braid_friction,
                          friction_model="maxwell-slip", friction_elements=n_elements, slip_length=slip_length)


def slip_level(params, pressure):
    """F_s = mu pi r0^2 max(p - p_th, 0) (Tondu 2012 friction level), written out independently."""
    net = max(pressure - params.threshold_pressure, 0.0)
    return params.braid_friction * math.pi * params.rest_radius ** 2 * net


def lengths(ticks):
    return REST + GRID * np.asarray(ticks, dtype=float)


def run(params, ticks, pressure=4e5, state=None):
    return hysteresis.trace(params, lengths(ticks), pressure, state)


def fill(ticks):
    """Every grid point between consecutive ticks: the finest monotone subdivision of the path."""
    out = [ticks[0]]
    for a, b in zip(ticks, ticks[1:]):
        step = 1 if b >= a else -1
        out.extend(range(a + step, b + step, step) if b != a else [b])
    return out


paths = st.lists(st.integers(-4000, 4000), min_size=2, max_size=12)
element_counts = st.sampled_from(POWERS_OF_TWO)


# ---- rate independence ---------------------------------------------------------------------------
@SETTINGS
@given(path=paths, n=element_counts, data=st.data())
def test_rate_independence_any_monotone_subdivision_gives_the_same_states_exactly(path, n, data):
    # Maxwell-slip elements are rate independent (Vo-Minh et al. 2011; Brokate & Sprekels 1996,
    # stop operator): only the visited lengths matter, not how finely a monotone piece is
    # cut. Reference: the same path through its reversal points only; tolerance: exact (binary grid).
    params = braid(n)
    coarse = run(params, path)
    fine_ticks, marks = [path[0]], [0]
    for a, b in zip(path, path[1:]):
        inner = data.draw(st.lists(st.integers(min(a, b), max(a, b)), max_size=6))
        fine_ticks.extend(sorted(inner, reverse=b < a) + [b])
        marks.append(len(fine_ticks) - 1)
    fine = run(params, fine_ticks)
    finest = run(params, fill(path))
    finest_marks = np.cumsum([0] + [max(abs(b - a), 1) for a, b in zip(path, path[1:])])
    assert np.array_equal(fine.states[marks], coarse.states)
    assert np.array_equal(fine.force[marks], coarse.force)
    assert np.array_equal(finest.states[finest_marks], coarse.states)


@SETTINGS
@given(path=st.lists(st.floats(-3e-3, 3e-3), min_size=2, max_size=10), n=st.integers(1, 64),
       cuts=st.integers(2, 50))
def test_rate_independence_on_arbitrary_floats_within_round_off(path, n, cuts):
    # As above for any lengths and element counts (Brokate & Sprekels 1996). Reference:
    # the coarse path; tolerance derived from round-off: each update adds one rounding of at most
    # 2**-53 * 7 mm, so 1e-15 m covers several hundred updates.
    params = braid(n, slip_length=1e-3)
    coarse = hysteresis.trace(params, REST + np.array(path), 4e5)
    fine = [REST + path[0]]
    for a, b in zip(path, path[1:]):
        fine.extend(REST + a + (b - a) * np.arange(1, cuts + 1) / cuts)
    fine_trace = hysteresis.trace(params, np.array(fine), 4e5)
    np.testing.assert_allclose(fine_trace.states[::cuts], coarse.states, rtol=0, atol=1e-15)


# ---- return-point memory / wiping out ------------------------------------------------------------
@SETTINGS
@given(history=paths, n=element_counts, rise=st.integers(1, 4000), sign=st.sampled_from([1, -1]),
       excursion=st.lists(st.floats(0.0, 1.0), min_size=1, max_size=8), beyond=st.integers(1, 3000))
def test_wiping_out_an_inner_loop_leaves_no_trace(history, n, rise, sign, excursion, beyond):
    # Return-point memory / wiping-out property of sums of stop operators (Mayergoyz 1991,
    # "Mathematical Models of Hysteresis"; Brokate & Sprekels 1996): after a monotone run from a
    # reversal point m to A, any excursion inside [m, A] that comes back to A restores the state
    # the elements had at A, and the outer curve goes on as if the excursion never happened.
    # Reference: the same path without the excursion; tolerance: exact (binary grid).
    params = braid(n)
    m = history[-1]
    a = m + sign * rise
    inner = [a - sign * round(f * rise) for f in excursion]      # all within [m, A]
    continuation = [a + sign * k for k in range(1, beyond + 1, max(beyond // 7, 1))]
    plain = run(params, history + [a] + continuation)
    looped = run(params, history + [a] + inner + [a] + continuation)
    at_a = len(history)
    back_at_a = at_a + len(inner) + 1
    assert np.array_equal(looped.states[back_at_a], plain.states[at_a])
    assert np.array_equal(looped.states[back_at_a + 1:], plain.states[at_a + 1:])
    assert np.array_equal(looped.force[back_at_a + 1:], plain.force[at_a + 1:])


def test_wiping_out_fails_for_an_excursion_beyond_the_reversal_point():
    # Counter-check of the property above (Mayergoyz 1991): the memory of m is wiped out only by an
    # excursion that leaves [m, A]. Going below m by more than the slip length re-saturates every
    # element the other way, so back at A the state differs. Reference: derived; tolerance exact.
    params = braid(8)
    m, a = 0, 600                               # 600 grid steps = 0.57 mm, less than the slip length
    plain = run(params, [4000, m, a])
    overshoot = run(params, [4000, m, a, m - 3000, a])
    assert not np.array_equal(overshoot.states[-1], plain.states[-1])


# ---- saturation ----------------------------------------------------------------------------------
@SETTINGS
@given(history=paths, n=st.integers(1, 64), extra=st.integers(0, 3000), sign=st.sampled_from([1, -1]),
       pressure=st.floats(0.0, 6e5), virgin=st.booleans())
def test_a_stretch_of_the_slip_length_saturates_at_the_slip_force(history, n, extra, sign, pressure, virgin):
    # Elasto-slide elements (Vo-Minh et al. 2011): element i slides once its stretch reaches delta_i,
    # so from the virgin state (e = 0) a monotone stretch of at least s = delta_M, and from any state
    # (e_i >= -delta_i) one of at least 2 s, leaves every e_i = +-delta_i and F_h = +-F_s =
    # +-mu pi r0^2 p_net (closed form). Tolerance: exact for the states, 1e-12 relative for the
    # force (the shares 1/M sum to 1 within round-off).
    params = braid(n)
    start = [history[-1]] if virgin else history
    end = start[-1] + sign * ((1 if virgin else 2) * round(SLIP / GRID) + extra)
    traced = run(params, start + [end], pressure)
    delta = hysteresis.breakaways(n, SLIP)
    assert np.array_equal(traced.states[-1], sign * delta)
    assert traced.force[-1] == pytest.approx(sign * slip_level(params, pressure), rel=1e-12)


def test_a_stretch_short_of_the_slip_length_does_not_saturate():
    # Counter-check (derived): from the virgin state a stretch of s - 1 grid step leaves the last
    # element (delta_M = s) one step short of sliding: F_h = F_s (1 - 1 / (M 1024)) < F_s.
    params = braid(8)
    traced = run(params, [0, round(SLIP / GRID) - 1], 3e5)
    assert traced.force[-1] == pytest.approx(slip_level(params, 3e5) * (1 - 1 / (8 * 1024)), rel=1e-12)


@SETTINGS
@given(path=paths, n=st.integers(1, 64), pressure=st.floats(0.0, 6e5))
def test_friction_never_exceeds_the_slip_force(path, n, pressure):
    # Each element's spring force is bounded by its slip force w_i F_s (Coulomb slider), hence
    # |F_h| <= F_s along any path (closed form); tolerance 1e-12 relative for round-off.
    params = braid(n)
    traced = run(params, fill(path)[::7] + [path[-1]], pressure)
    assert np.all(np.abs(traced.force) <= slip_level(params, pressure) * (1 + 1e-12))
    assert np.all(np.abs(traced.states) <= hysteresis.breakaways(n, SLIP))


# ---- virgin curve --------------------------------------------------------------------------------
@pytest.mark.parametrize("n", [1, 3, 8, 13])
@pytest.mark.parametrize("sign", [1, -1])
def test_virgin_curve_is_piecewise_linear_with_stiffness_falling_at_each_breakaway(n, sign):
    # Virgin curve of the Maxwell-slip model (Vo-Minh et al. 2011; Lampaert et al. 2003): from the
    # relaxed state element i is a spring of stiffness w_i F_s / delta_i until it breaks away at
    # delta_i = s i / M, so (derived) F(x) = F_s / M sum_i min(x / delta_i, 1) and the stiffness
    # between the k-th and (k+1)-th breakaway is (F_s / s) sum_{i>k} 1 / i, zero beyond s; odd in x.
    # Stiffness by numerical differentiation (central differences inside each segment); tolerance
    # 1e-6 relative (round-off of differences of forces over one tenth of a segment).
    s, pressure = 1e-3, 3e5
    params = braid(n, slip_length=s)
    f_s = slip_level(params, pressure)
    x = np.linspace(0.0, 1.5 * s, 1501)
    traced = hysteresis.trace(params, REST + sign * x, pressure)
    delta = s * np.arange(1, n + 1) / n
    expected = f_s / n * np.minimum(x[:, None] / delta[None, :], 1.0).sum(axis=1)
    np.testing.assert_allclose(traced.force, sign * expected, rtol=1e-12, atol=1e-12 * f_s)
    bounds = np.concatenate([[0.0], delta, [1.5 * s]])
    slopes = []
    for k in range(n + 1):
        lo, hi = bounds[k], bounds[k + 1]
        mid, h = 0.5 * (lo + hi), 0.1 * (hi - lo)
        probe = hysteresis.trace(params, REST + sign * np.array([0.0, mid - h, mid + h]), pressure)
        slope = sign * (probe.force[2] - probe.force[1]) / (2 * h)
        assert slope == pytest.approx(f_s / s * sum(1.0 / i for i in range(k + 1, n + 1)), rel=1e-6, abs=1e-6)
        slopes.append(slope)
    assert all(later < earlier for earlier, later in zip(slopes, slopes[1:]))
    assert slopes[-1] == pytest.approx(0.0, abs=1e-6 * f_s / s)


# ---- loop width and pressure ---------------------------------------------------------------------
def _cycle(center, amplitude, cycles=2, points=400):
    """Ticks of ``cycles`` full triangle cycles center -> +A -> -A -> ... starting at the centre."""
    quarter = np.linspace(0, amplitude, points + 1)[1:]
    one = np.concatenate([quarter, amplitude - 2 * quarter, -amplitude + quarter])
    return np.concatenate([[0.0]] + [one] * cycles) + center


@pytest.mark.parametrize("amplitude_over_s", [0.3, 0.75, 1.25, 2.0, 3.0])
def test_loop_width_at_mid_stroke_grows_in_proportion_to_net_pressure(amplitude_over_s):
    # Width of the settled loop at mid-stroke between the lengthening and shortening branches of a
    # symmetric cycle +-A: element i reaches -delta_i at the bottom when A >= delta_i and rises by A,
    # so (derived) width = 2 F_s sum_i w_i clip(A / delta_i - 1, 0, 1), which is 2 F_s for A >= 2 s
    # and is proportional to the net pressure p - p_th since F_s = mu pi r0^2 p_net and the states do
    # not depend on pressure. Tolerance 1e-9 relative.
    s, n = 1e-3, 8
    params = braid(n, slip_length=s)
    amplitude = amplitude_over_s * s
    path = _cycle(REST, amplitude, cycles=2, points=400)
    # second cycle starts at index 1 + 1200: +A at + 399, mid-stroke going down at + 400 + 199,
    # back at the centre going up at the very end
    down, up = 1 + 1200 + 400 + 199, path.size - 1
    assert path[down] == pytest.approx(REST) and path[up] == pytest.approx(REST)
    delta = s * np.arange(1, n + 1) / n
    share = np.clip(amplitude / delta - 1.0, 0.0, 1.0).mean()
    widths = []
    for pressure in (2e4, 1e5, 3e5, 6e5):
        traced = hysteresis.trace(params, path, pressure)
        width = traced.force[up] - traced.force[down]
        assert width == pytest.approx(2 * slip_level(params, pressure) * share, rel=1e-9, abs=1e-12)
        widths.append(width / (pressure - params.threshold_pressure))
    assert widths == pytest.approx([widths[0]] * 4, rel=1e-9, abs=1e-15)
    # no friction below the threshold pressure (Klute & Hannaford 2000 threshold as in muscle.py)
    assert np.all(hysteresis.trace(params, path, params.threshold_pressure).force == 0.0)


def test_lengthening_raises_and_shortening_lowers_the_tension_like_the_tanh_law():
    # Sense and level shared with the tanh law (Tondu 2012; muscle.braid_friction_force, which is
    # signed like the contraction rate and subtracted from the static force): once the braid slides
    # the Maxwell-slip force, added to the tension, equals the tanh law at a fast rate
    # (tanh(40) = 1 in float64). Reference: muscle.braid_friction_force; tolerance 1e-12 relative.
    params = braid(8, slip_length=1e-3)
    fast = 40 * params.friction_rate_scale
    for pressure in (2e5, 5e5):
        longer = hysteresis.trace(params, REST + np.array([0.0, 2e-3]), pressure).force[-1]
        shorter = hysteresis.trace(params, REST - np.array([0.0, 2e-3]), pressure).force[-1]
        # lengthening = negative contraction rate
        assert longer == pytest.approx(-float(muscle.braid_friction_force(params, pressure, -fast)), rel=1e-12)
        assert shorter == pytest.approx(-float(muscle.braid_friction_force(params, pressure, fast)), rel=1e-12)
        assert longer > 0 > shorter


@SETTINGS
@given(path=paths, n=element_counts, data=st.data())
def test_element_states_do_not_depend_on_pressure_and_force_scales_with_it(path, n, data):
    # This module's parametrisation (after Tondu 2012's pressure-proportional friction): the element
    # stretches follow the length only; the force is F_s(p) times a pressure-free engagement.
    # Reference: the same path at 1 bar and at a varying pressure; tolerance exact for the states,
    # 1e-12 relative for the force.
    params = braid(n, threshold=0.0)
    ticks = fill(path)[::5]
    # up to 64 drawn pressures repeated along the path (a list as long as a long path is more
    # than hypothesis can draw)
    drawn = data.draw(st.lists(st.floats(0.0, 6e5), min_size=1, max_size=64))
    varying = np.resize(np.array(drawn), len(ticks))
    base = run(params, ticks, 1e5)
    other = run(params, ticks, varying)
    assert np.array_equal(base.states, other.states)
    np.testing.assert_allclose(other.force, base.force * varying / 1e5, rtol=1e-12, atol=1e-12)


# ---- dissipated energy ---------------------------------------------------------------------------
@SETTINGS
@given(n=st.integers(1, 24), amplitude_over_s=st.floats(0.05, 4.0), pressure=st.floats(5e4, 6e5))
def test_area_of_a_closed_loop_equals_the_dissipation_in_closed_form(n, amplitude_over_s, pressure):
    # Work dissipated per settled cycle of +-A (derived, as Iwan 1966 for parallel elasto-slide
    # elements): element i with slip force w_i F_s and breakaway delta_i traces a parallelogram of
    # height 2 w_i F_s and width 2 (A - delta_i) when A > delta_i, area 4 w_i F_s (A - delta_i);
    # so W = 4 F_s sum_i w_i max(A - delta_i, 0) = (4 F_s / M) sum_{i: delta_i < A} (A - s i / M),
    # which is 4 F_s (A - s (M + 1) / (2 M)) once A >= s.
    # Loop integral of F dl by the trapezoid rule (numpy) on a grid that holds every kink (steps of
    # s / (M K) with A on the grid), which is exact for a piecewise linear loop up to round-off;
    # tolerance 1e-9 relative.
    s = 1e-3
    params = braid(n, slip_length=s)
    k_sub = 20
    h = s / (n * k_sub)
    steps = max(int(round(amplitude_over_s * s / h)), 1)
    amplitude = steps * h
    up = np.arange(1, steps + 1) * h
    # centre -> +A -> -A -> centre in steps of h; after the first cycle the loop repeats itself
    one = np.concatenate([up, amplitude - np.arange(1, 2 * steps + 1) * h, -amplitude + up])
    path = REST + np.concatenate([[0.0], one, one])
    traced = hysteresis.trace(params, path, pressure)
    loop = slice(one.size, path.size)             # the second cycle, closed at the centre
    assert path[loop][0] == pytest.approx(path[loop][-1], abs=1e-15)
    area = np.trapezoid(traced.force[loop], traced.length[loop])
    delta = s * np.arange(1, n + 1) / n
    f_s = slip_level(params, pressure)
    expected = 4 * f_s * np.maximum(amplitude - delta, 0.0).sum() / n
    assert area == pytest.approx(expected, rel=1e-9, abs=1e-9 * f_s * s)
    if amplitude >= s:
        assert expected == pytest.approx(4 * f_s * (amplitude - s * (n + 1) / (2 * n)), rel=1e-12)


# ---- kernel use and parameters -------------------------------------------------------------------
@numba.njit
def _two_muscles(states, length_changes, breakaway, weight, slip):
    forces = np.empty((length_changes.shape[0], 2))
    for k in range(length_changes.shape[0]):
        for side in range(2):
            hysteresis.update(states[side], length_changes[k, side], breakaway)
            forces[k, side] = hysteresis.force(states[side], breakaway, weight, slip)
    return forces


def test_kernel_functions_run_inside_compiled_code_on_rows_of_a_state_table():
    # The compiled plant keeps the element states of both muscles as rows of one array and calls
    # update/force from nopython code. Reference: trace() of each muscle's own length path, as the
    # numpy face of the same law; tolerance exact (same operations in the same order).
    params = braid(8)
    ticks_a = fill([0, 900, -300, 500])
    ticks_b = [-t for t in ticks_a]
    la, lb = lengths(ticks_a), lengths(ticks_b)
    table = hysteresis.braid_elements(params)
    states = np.zeros((2, 8))
    f_s = hysteresis.slip_force(params.braid_friction, params.rest_radius, params.threshold_pressure, 4e5)
    forces = _two_muscles(states, np.stack([np.diff(la), np.diff(lb)], axis=1), table.breakaway, table.weight, f_s)
    assert np.array_equal(forces[:, 0], hysteresis.trace(params, la, 4e5).force[1:])
    assert np.array_equal(forces[:, 1], hysteresis.trace(params, lb, 4e5).force[1:])
    # the engagement is the force per unit slip force, in [-1, 1]
    g = hysteresis.engagement(states[0], table.breakaway, table.weight)
    assert g * f_s == forces[-1, 0] and -1.0 <= g <= 1.0


def test_trace_rejects_bad_paths_and_states_on_one_line():
    params = braid(4)
    for bad in ([], [[0.25, 0.26]], [0.25, float("nan")]):
        with pytest.raises(DataError, match=r"^lengths: .*must be a non-empty 1-D array") as info:
            hysteresis.trace(params, bad, 1e5)
        assert "\n" not in str(info.value)
    with pytest.raises(DataError, match=r"^pressure: .*one per length sample"):
        hysteresis.trace(params, [0.25, 0.26, 0.27], [1e5, 2e5])
    with pytest.raises(DataError, match=r"^state: .*must hold 4 stretches"):
        hysteresis.trace(params, [0.25], 1e5, state=np.full(4, 2 * SLIP))
    with pytest.raises(DataError, match=r"^state: .*must hold 4 stretches"):
        hysteresis.trace(params, [0.25], 1e5, state=np.zeros(3))


@pytest.mark.parametrize("field, value, expect", [
    ("friction_model", "bouc-wen", "one of tanh, maxwell-slip"),
    ("friction_model", None, "one of tanh, maxwell-slip"),
    ("friction_elements", 0, "a whole number in [1, 64]"),
    ("friction_elements", 65, "a whole number in [1, 64]"),
    ("friction_elements", 8.0, "a whole number in [1, 64]"),
    ("friction_elements", True, "a whole number in [1, 64]"),
    ("slip_length", 0.0, "a finite number > 0"),
    ("slip_length", float("nan"), "a finite number > 0"),
    ("slip_length", "1 mm", "a number"),
    ("slip_length", 0.3, "<= rest_length (0.25 m)"),
])
def test_friction_model_parameters_are_validated_with_the_field_named(field, value, expect):
    with pytest.raises(ParameterError, match=rf"^McKibbenParams\.{field}: ") as info:
        McKibbenParams(**{**braid().__dict__, field: value})
    assert expect in str(info.value) and "\n" not in str(info.value)


def test_defaults_keep_the_tanh_law():
    # The simple tanh friction stays the default; the element defaults are 8 elements over 1 mm.
    p = McKibbenParams(rest_length=REST, rest_radius=0.008, rest_braid_angle=math.radians(22))
    assert (p.friction_model, p.friction_elements, p.slip_length) == ("tanh", 8, 1e-3)
    assert McKibbenParams(**{**p.__dict__, "friction_elements": np.int64(16)}).friction_elements == 16
