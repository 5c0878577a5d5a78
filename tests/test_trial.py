"""The trial core: per-member noise streams, divergence of one member, trial bounds."""
import numpy as np
import pytest

from muscle_sim.simulation import Setup
from muscle_sim.trial import MAX_TRIAL, NOISE_BLOCK, NoiseStreams, TrialBatch, check_trial

from conftest import DEMO, DRIFT


def test_noise_streams_draw_exactly_what_one_draw_per_reading_would():
    # Reference: numpy's Generator drawing standard_normal(width) once per reading, with a
    # two-value draw between trials (where a trial's drift spread is drawn). Trials end at random
    # points, most of them inside a block, so the unused part of a block must be rewound exactly.
    width, members = 3, 4
    plan = np.random.default_rng(1).integers(1, 3 * NOISE_BLOCK, size=(members, 6))
    streams = NoiseStreams(members, width)
    ours = [np.random.default_rng(100 + i) for i in range(members)]
    refs = [np.random.default_rng(100 + i) for i in range(members)]
    expected_len = 3 * NOISE_BLOCK                     # what each trial expects; it may end earlier
    for trial in range(plan.shape[1]):
        for i in range(members):
            streams.attach(i, ours[i], expected_len)
            np.testing.assert_array_equal(ours[i].standard_normal(2), refs[i].standard_normal(2))
        steps = plan[:, trial]
        for k in range(steps.max()):
            live = k < steps
            got = streams.take(live).copy()
            for i in np.flatnonzero(live):
                np.testing.assert_array_equal(got[i], refs[i].standard_normal(width))


def test_one_diverging_member_ends_with_a_fault_and_the_others_go_on():
    setup = Setup.from_config(DEMO)
    core = TrialBatch(setup, 3)
    core.begin([0, 1, 2], [0, 0, 0], [np.random.default_rng(i) for i in range(3)])
    core.read()
    hold = core.p_hold.copy()
    core.step(hold)
    core.read()
    core.stepper._x[1, 1] = np.nan                     # member 1's state is corrupted
    core.step(hold)
    y = core.read()
    assert core.terminated.tolist() == [False, True, False]
    assert core.reward[1] == -100.0 and np.all(np.isfinite(y))
    m = core.metrics(1)
    assert m["fault"].startswith("simulation diverged") and m["settled"] is False
    for _ in range(5):
        core.step(hold)
        core.read()
    assert np.isfinite(core.stepper._x[[0, 2]]).all() and not core.terminated[[0, 2]].any()


def test_trial_indices_are_bounded_and_far_trials_stay_finite():
    for bad in (-1, MAX_TRIAL + 1, 2.0, True, "1", None, np.float64(3)):
        with pytest.raises(ValueError, match="trial"):
            check_trial(bad)
    assert check_trial(np.int64(7)) == 7
    setup = Setup.from_config(DRIFT)
    core = TrialBatch(setup, 1)
    core.begin([0], [MAX_TRIAL], [np.random.default_rng(0)])   # friction growth capped, no overflow
    y = core.read()
    assert np.all(np.isfinite(y)) and np.isfinite(core.params[0].joint.coulomb_torque)
