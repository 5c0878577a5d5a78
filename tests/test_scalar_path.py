"""The scalar fast path (bound kernel on Python floats) against the batched numpy core."""
from dataclasses import replace

import numpy as np

from muscle_sim.integrate import Stepper
from muscle_sim.params import PlantParams
from muscle_sim.plant import rhs, rhs_f, scalar_kernel

from conftest import strike_commands


def _variants(demo):
    p = demo.plant
    grav = replace(p.joint, gravity_moment=0.7, gravity_offset=0.3)
    yield p
    yield demo.prior
    yield PlantParams(replace(p.muscle, wall_thickness=0.0, end_correction=1.0, braid_friction=0.0,
                              threshold_pressure=0.0), grav, p.pneumatics)
    yield PlantParams(p.muscle, grav, replace(p.pneumatics, model="lag", max_pressure_rate=2e7))


def test_scalar_rhs_equals_batched_rhs(demo_setup):
    # Reference: the batched numpy rhs, the same equations; tolerance 1e-12 relative (abs 1e-9).
    rng = np.random.default_rng(0)
    for params in _variants(demo_setup):
        f = scalar_kernel(params)
        X = np.column_stack([rng.uniform(-1.0, 1.0, 200), rng.uniform(-20, 20, 200), rng.uniform(0, 6e5, 200),
                             rng.uniform(0, 6e5, 200), rng.uniform(-1.2, 1.2, 200), rng.uniform(-1.2, 1.2, 200)])
        X[:10, 2:4] = [[0.0, 6e5]] * 10            # pressures at atmosphere and at supply
        X[10:20, 0] = [1.2, -1.2, 0.9, -0.9, 0.79, -0.79, 1.5, -1.5, 0.0, 0.5]   # stops and slack
        X[20:30, 4:6] = 0.0                         # closed spools
        U = rng.uniform(0, 6e5, (200, 2))
        batched = rhs(0.0, X, U, params)
        for x, u, want in zip(X, U, batched):
            got = np.array(f(*x, *u))
            np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-9)
            np.testing.assert_allclose(rhs_f(0.0, list(x), u, params), want, rtol=1e-12, atol=1e-9)


def test_scalar_stepper_equals_batched_stepper(demo_setup):
    # Reference: Stepper(batch=1) on the numpy core; 400 control steps of a strike; 1e-9 relative.
    x0, hold, cmd = strike_commands(demo_setup, n_steps=400)
    task = demo_setup.task
    for params in _variants(demo_setup):
        a = Stepper(params, task.dt, task.n_substeps)
        b = Stepper(params, task.dt, task.n_substeps, batch=1)
        a.reset(x0, hold)
        b.reset(x0[None, :], hold)
        for u in cmd:
            xa = np.array(a.step(u))
            xb = b.step(u[None, :])[0]
            np.testing.assert_allclose(xa, xb, rtol=1e-9, atol=1e-6)
