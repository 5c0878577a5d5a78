"""Environment speed: the single env through ``gymnasium.make`` and the native vector env at
B = 1, 64, 1024, 16384 through ``gymnasium.make_vec``, each beside Gymnasium's ``Pendulum-v1``
(through ``gymnasium.make``) measured in the same run. Writes benchmarks/results/env_speed.json.

Goals: single env >= 0.5x Pendulum-v1 steps/s; batched >= 500,000 env-steps/s at B = 1024 and
>= 1,000,000 at B = 16384, on one core. The process is pinned to one CPU where the OS allows it;
thread-pool settings (OPENBLAS & co.) do not matter here: the single env is pure Python and the
vector env only does element-wise numpy work, which numpy runs on one thread anyway.
Timing: time.perf_counter, a warm-up, best of 3 repeats (Pendulum and ours interleaved, so both
see the same machine state). Runs in well under two minutes.
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

import muscle_sim  # noqa: E402,F401  (registers pamjoint/FlipperStrike-v0)
from muscle_sim.records import write_json_atomic  # noqa: E402

ENV_ID = "pamjoint/FlipperStrike-v0"
REFERENCE_ID = "Pendulum-v1"
OUT = ROOT / "benchmarks" / "results" / "env_speed.json"
ACTION = (-0.3, -0.1)            # fixed action of the single and batched runs
SINGLE_STEPS = 20000             # per repeat
BATCH_SIZES = (1, 64, 1024, 16384)
BATCH_ENV_STEPS = 400000         # env-steps per repeat (so about as long for every B)
REPEATS = 3


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


def single_env_rates():
    """(Pendulum-v1 steps/s, FlipperStrike steps/s): warm-up, then best of REPEATS, interleaved."""
    pendulum = gym.make(REFERENCE_ID)
    ours = gym.make(ENV_ID)
    pend_action = np.array([0.5], dtype=np.float32)
    our_action = np.array(ACTION, dtype=np.float32)
    pendulum.reset(seed=0)
    ours.reset(seed=0)
    _single_steps_per_second(pendulum, pend_action, 2000)     # warm-up (and the env checker's first step)
    _single_steps_per_second(ours, our_action, 2000)
    best_pend = best_ours = 0.0
    for _ in range(REPEATS):
        best_pend = max(best_pend, _single_steps_per_second(pendulum, pend_action, SINGLE_STEPS))
        best_ours = max(best_ours, _single_steps_per_second(ours, our_action, SINGLE_STEPS))
    pendulum.close()
    ours.close()
    return best_pend, best_ours


def vector_env_rate(num_envs: int) -> float:
    """Env-steps/s of the native vector env (it autoresets itself): warm-up, best of REPEATS."""
    venv = gym.make_vec(ENV_ID, num_envs=num_envs, vectorization_mode="vector_entry_point")
    try:
        action = np.tile(np.array(ACTION, dtype=np.float32), (num_envs, 1))
        venv.reset(seed=0)
        steps = max(10, min(1000, BATCH_ENV_STEPS // num_envs))
        for _ in range(min(steps, 20)):                         # warm-up
            venv.step(action)
        best = 0.0
        for _ in range(REPEATS):
            t0 = time.perf_counter()
            for _ in range(steps):
                venv.step(action)
            best = max(best, steps * num_envs / (time.perf_counter() - t0))
        return best
    finally:
        venv.close()


def main() -> dict:
    t_start = time.perf_counter()
    cpu = _pin_one_core()
    pend, single = single_env_rates()
    batched = []
    for b in BATCH_SIZES:
        try:
            rate = vector_env_rate(b)
            batched.append({"num_envs": b, "env_steps_per_s": rate, "over_pendulum": rate / pend})
        except Exception as exc:   # the vector env may not exist yet: record it and go on
            batched.append({"num_envs": b, "error": f"{type(exc).__name__}: {exc}"})
    goals = {"single_over_pendulum": 0.5, "B1024_env_steps_per_s": 500000.0, "B16384_env_steps_per_s": 1000000.0}
    by_b = {row["num_envs"]: row.get("env_steps_per_s") for row in batched}
    met = {"single_over_pendulum": single / pend >= goals["single_over_pendulum"],
           "B1024_env_steps_per_s": (by_b[1024] or 0.0) >= goals["B1024_env_steps_per_s"],
           "B16384_env_steps_per_s": (by_b[16384] or 0.0) >= goals["B16384_env_steps_per_s"]}
    out = {
        "benchmark": "env_speed",
        "machine": {"python": platform.python_version(), "implementation": platform.python_implementation(),
                    "numpy": np.__version__, "gymnasium": gym.__version__, "platform": platform.platform(),
                    "processor": platform.processor() or platform.machine(), "cpu_count": os.cpu_count(),
                    "pinned_cpu": cpu},
        "method": {"timer": "time.perf_counter", "repeats": REPEATS, "statistic": "best of repeats after warm-up",
                   "action": list(ACTION), "single_steps_per_repeat": SINGLE_STEPS,
                   "single": f"gymnasium.make('{ENV_ID}'), reset when an episode ends",
                   "reference": f"gymnasium.make('{REFERENCE_ID}') in the same run, interleaved repeats",
                   "batched": f"gymnasium.make_vec('{ENV_ID}', num_envs=B, vectorization_mode='vector_entry_point')"},
        "goal": goals,
        "pendulum_v1_steps_per_s": pend,
        "pendulum_v1_us_per_step": 1e6 / pend,
        "single_env_steps_per_s": single,
        "single_env_us_per_step": 1e6 / single,
        "single_over_pendulum": single / pend,
        "batched": batched,
        "goal_met": met,
        "runtime_s": None,
    }
    out["runtime_s"] = time.perf_counter() - t_start
    write_json_atomic(OUT, out)
    print(f"{'':28s}{'steps/s':>14s}{'us/step':>10s}{'x Pendulum':>12s}")
    print(f"{'Pendulum-v1 (reference)':28s}{pend:14,.0f}{1e6 / pend:10.2f}{1.0:12.2f}")
    print(f"{'FlipperStrike single':28s}{single:14,.0f}{1e6 / single:10.2f}{single / pend:12.2f}"
          f"   goal >= 0.5x: {'met' if met['single_over_pendulum'] else 'NOT met'}")
    for row in batched:
        label = f"vector B = {row['num_envs']}"
        if "error" in row:
            print(f"{label:28s}  error: {row['error']}")
        else:
            r = row["env_steps_per_s"]
            print(f"{label:28s}{r:14,.0f}{1e6 / r:10.3f}{row['over_pendulum']:12.2f}")
    print(f"goals: B=1024 >= 500,000: {'met' if met['B1024_env_steps_per_s'] else 'NOT met'}; "
          f"B=16384 >= 1,000,000: {'met' if met['B16384_env_steps_per_s'] else 'NOT met'}  "
          f"({out['runtime_s']:.0f} s) -> {OUT.relative_to(ROOT)}")
    return out


if __name__ == "__main__":
    main()
