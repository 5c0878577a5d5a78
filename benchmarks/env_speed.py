"""Environment speed: the single env through ``gymnasium.make`` beside Gymnasium's ``Pendulum-v1``,
the native vector env through ``gymnasium.make_vec`` at B = 1 (beside our single env) and
B = 64, 1024, 4096, 16384 (beside Gymnasium's own native vector ``CartPole-v1`` at the same B),
all measured in the same run, plus the first-run compile time of the kernel (a fresh process
with an empty compile cache, against the same process start with the cache warm).
Writes benchmarks/results/env_speed.json.

Goals: single env >= 1.0x Pendulum-v1 steps/s; vector env at B = 4096 >= 0.15x vector
CartPole-v1 env-steps/s; vector env at B = 1 no slower than 3x our single env, on one core.
The process is pinned to one CPU where the OS allows it and BLAS to one thread (threadpoolctl).
Timing: time.perf_counter, a warm-up, then REPEATS repeats with the reference and ours
interleaved (both see the same machine state); the statistic is the median of the per-repeat
ratios (and medians of the rates).
"""
from __future__ import annotations

import os
import platform
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import gymnasium as gym  # noqa: E402
import numpy as np  # noqa: E402

import muscle_sim  # noqa: E402,F401  (registers pamjoint/FlipperStrike-v1)
from muscle_sim.records import write_json_atomic  # noqa: E402

ENV_ID = "pamjoint/FlipperStrike-v1"
REFERENCE_ID = "Pendulum-v1"
OUT = ROOT / "benchmarks" / "results" / "env_speed.json"
ACTION = (-0.3, -0.1)            # fixed action of the single and batched runs
SINGLE_STEPS = 20000             # per repeat
BATCH_SIZES = (64, 1024, 4096, 16384)
BATCH_ENV_STEPS = 400000         # env-steps per repeat (so about as long for every B)
REPEATS = 7
CARTPOLE_ID = "CartPole-v1"


def _pin_one_core():
    """Pin this process to one CPU; returns its number (None where the OS does not allow it)."""
    try:
        cpu = min(os.sched_getaffinity(0))
        os.sched_setaffinity(0, {cpu})
        return cpu
    except (AttributeError, OSError):
        return None


def _single_steps_per_second(env, action, steps: int) -> float:
    """Steps/s of ``steps`` env.step calls, resetting when an episode ends."""
    step, reset = env.step, env.reset
    t0 = time.perf_counter()
    for _ in range(steps):
        _, _, terminated, truncated, _ = step(action)
        if terminated or truncated:
            reset()
    return steps / (time.perf_counter() - t0)


def _median(values):
    return float(np.median(np.asarray(values, dtype=float)))


def _vector_rate(venv, action, steps: int) -> float:
    t0 = time.perf_counter()
    for _ in range(steps):
        venv.step(action)
    return steps * venv.num_envs / (time.perf_counter() - t0)


def single_env_rates():
    """Per repeat (Pendulum-v1 steps/s, FlipperStrike steps/s, vector B=1 env-steps/s), interleaved."""
    pendulum = gym.make(REFERENCE_ID)
    ours = gym.make(ENV_ID)
    vec1 = gym.make_vec(ENV_ID, num_envs=1, vectorization_mode="vector_entry_point")
    pend_action = np.array([0.5], dtype=np.float32)
    our_action = np.array(ACTION, dtype=np.float32)
    vec_action = our_action[None, :].copy()
    pendulum.reset(seed=0)
    ours.reset(seed=0)
    vec1.reset(seed=0)
    _single_steps_per_second(pendulum, pend_action, 2000)     # warm-up (and the env checker's first step)
    _single_steps_per_second(ours, our_action, 2000)
    _vector_rate(vec1, vec_action, 2000)
    rows = []
    for _ in range(REPEATS):
        rows.append((_single_steps_per_second(pendulum, pend_action, SINGLE_STEPS),
                     _single_steps_per_second(ours, our_action, SINGLE_STEPS),
                     _vector_rate(vec1, vec_action, SINGLE_STEPS // 4)))
    pendulum.close()
    ours.close()
    vec1.close()
    return rows


def vector_env_rates(num_envs: int):
    """Per repeat (CartPole-v1 vector env-steps/s, ours), interleaved, after a warm-up."""
    ours = gym.make_vec(ENV_ID, num_envs=num_envs, vectorization_mode="vector_entry_point")
    cart = gym.make_vec(CARTPOLE_ID, num_envs=num_envs, vectorization_mode="vector_entry_point")
    try:
        action = np.tile(np.array(ACTION, dtype=np.float32), (num_envs, 1))
        cart_action = np.zeros(num_envs, dtype=np.int64)
        ours.reset(seed=0)
        cart.reset(seed=0)
        steps = max(10, min(1000, BATCH_ENV_STEPS // num_envs))
        _vector_rate(ours, action, min(steps, 20))                 # warm-up
        _vector_rate(cart, cart_action, min(steps, 20))
        return [(_vector_rate(cart, cart_action, steps), _vector_rate(ours, action, steps)) for _ in range(REPEATS)]
    finally:
        ours.close()
        cart.close()


_FIRST_STEP = ("import time; t = time.perf_counter(); import gymnasium as gym, muscle_sim; "
               "env = gym.make('pamjoint/FlipperStrike-v1'); env.reset(seed=0); env.step(env.action_space.sample()); "
               "v = gym.make_vec('pamjoint/FlipperStrike-v1', num_envs=4, vectorization_mode='vector_entry_point'); "
               "v.reset(seed=0); v.step(v.action_space.sample()); print(time.perf_counter() - t)")


def compile_times():
    """Seconds from process start to the first steps of both envs: with an empty compile cache
    (NUMBA_CACHE_DIR pointing at a new folder) and again with that cache filled."""
    import subprocess
    import tempfile

    with tempfile.TemporaryDirectory() as cache:
        env = dict(os.environ, NUMBA_CACHE_DIR=cache)
        run = lambda: float(subprocess.run([sys.executable, "-c", _FIRST_STEP], env=env, cwd=ROOT,  # noqa: E731
                                           check=True, capture_output=True, text=True).stdout.split()[-1])
        cold = run()
        warm = _median([run() for _ in range(3)])
    return cold, warm


def main() -> dict:
    from threadpoolctl import threadpool_limits

    t_start = time.perf_counter()
    cpu = _pin_one_core()
    with threadpool_limits(limits=1, user_api="blas"):
        rows = single_env_rates()
        batched = []
        for b in BATCH_SIZES:
            reps = vector_env_rates(b)
            batched.append({"num_envs": b, "env_steps_per_s": _median([r[1] for r in reps]),
                            "cartpole_env_steps_per_s": _median([r[0] for r in reps]),
                            "over_cartpole": _median([r[1] / r[0] for r in reps])})
    cold, warm = compile_times()
    pend = _median([r[0] for r in rows])
    single = _median([r[1] for r in rows])
    vec1 = _median([r[2] for r in rows])
    over_pend = _median([r[1] / r[0] for r in rows])
    single_over_vec1 = _median([r[1] / r[2] for r in rows])
    by_b = {row["num_envs"]: row for row in batched}
    goals = {"single_over_pendulum": 1.0, "B4096_over_cartpole": 0.15, "single_over_vector_B1": 3.0}
    met = {"single_over_pendulum": over_pend >= goals["single_over_pendulum"],
           "B4096_over_cartpole": by_b[4096]["over_cartpole"] >= goals["B4096_over_cartpole"],
           "single_over_vector_B1": single_over_vec1 <= goals["single_over_vector_B1"]}
    out = {
        "benchmark": "env_speed",
        "machine": {"python": platform.python_version(), "implementation": platform.python_implementation(),
                    "numpy": np.__version__, "gymnasium": gym.__version__, "platform": platform.platform(),
                    "processor": platform.processor() or platform.machine(), "cpu_count": os.cpu_count(),
                    "pinned_cpu": cpu, "blas_threads": 1},
        "method": {"timer": "time.perf_counter", "repeats": REPEATS,
                   "statistic": "median over repeats of the per-repeat ratio (reference and ours interleaved)",
                   "action": list(ACTION), "single_steps_per_repeat": SINGLE_STEPS,
                   "single": f"gymnasium.make('{ENV_ID}'), reset when an episode ends",
                   "reference": f"gymnasium.make('{REFERENCE_ID}') in the same run",
                   "batched": f"gymnasium.make_vec('{ENV_ID}', num_envs=B, vectorization_mode='vector_entry_point')",
                   "batched_reference": f"gymnasium.make_vec('{CARTPOLE_ID}', num_envs=B, "
                                        f"vectorization_mode='vector_entry_point')"},
        "goal": goals,
        "pendulum_v1_steps_per_s": pend,
        "single_env_steps_per_s": single,
        "single_env_us_per_step": 1e6 / single,
        "single_over_pendulum": over_pend,
        "vector_B1_env_steps_per_s": vec1,
        "single_over_vector_B1": single_over_vec1,
        "batched": batched,
        "first_run_to_first_step_s": {"empty_compile_cache": cold, "warm_compile_cache": warm},
        "goal_met": met,
        "runtime_s": None,
    }
    out["runtime_s"] = time.perf_counter() - t_start
    write_json_atomic(OUT, out)
    ok = lambda key: "met" if met[key] else "NOT met"  # noqa: E731
    print(f"single env {single:,.0f} steps/s = {over_pend:.2f}x Pendulum-v1 ({pend:,.0f}/s)   goal >= 1.0x: "
          f"{ok('single_over_pendulum')}")
    print(f"vector B = 1 {vec1:,.0f} env-steps/s: single env is {single_over_vec1:.2f}x faster   goal <= 3x: "
          f"{ok('single_over_vector_B1')}")
    for row in batched:
        print(f"vector B = {row['num_envs']:5d} {row['env_steps_per_s']:12,.0f} env-steps/s = "
              f"{row['over_cartpole']:.3f}x vector CartPole-v1 ({row['cartpole_env_steps_per_s']:,.0f}/s)")
    print(f"goal B = 4096 >= 0.15x CartPole: {ok('B4096_over_cartpole')}; first run to first step "
          f"{cold:.1f} s with an empty compile cache, {warm:.1f} s warm ({out['runtime_s']:.0f} s) -> "
          f"{OUT.relative_to(ROOT)}")
    return out


if __name__ == "__main__":
    main()
