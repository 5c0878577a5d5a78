"""Environment speed: single env through gymnasium.make and the native vector env at B = 1, 64,
1024, 16384, each beside Gymnasium's Pendulum-v1 measured in the same run.
Writes benchmarks/results/env_speed.json. Goals: single >= 0.5x Pendulum-v1; batched >= 500,000
env-steps/s at B = 1024 and >= 1,000,000 at B = 16384 (one core).
"""
from __future__ import annotations

import os
import platform
import sys
import time
from pathlib import Path

import gymnasium as gym
import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import muscle_sim  # noqa: E402,F401  (registers the ids)
from muscle_sim.records import write_json_atomic  # noqa: E402

ENV_ID = "pamjoint/FlipperStrike-v0"


def steps_per_second(env, action, steps: int, repeats: int = 3) -> float:
    env.reset(seed=0)
    best = 0.0
    for _ in range(repeats):
        t0 = time.perf_counter()
        for _ in range(steps):
            _, _, term, trunc, _ = env.step(action)
            if np.any(term) or np.any(trunc):
                if np.ndim(term) == 0:
                    env.reset()
        best = max(best, steps / (time.perf_counter() - t0))
    return best


def main() -> dict:
    pendulum = gym.make("Pendulum-v1")
    pend = steps_per_second(pendulum, np.array([0.5], dtype=np.float32), 20000)
    single = gym.make(ENV_ID)
    ours = steps_per_second(single, np.array([-0.3, -0.1], dtype=np.float32), 4000)
    rows = {"pendulum_v1_steps_per_s": pend, "single_env_steps_per_s": ours, "single_over_pendulum": ours / pend}
    print(f"Pendulum-v1 {pend:10.0f} steps/s | FlipperStrike single {ours:10.0f} steps/s ({ours / pend:.2f}x)")
    batched = []
    for b in (1, 64, 1024, 16384):
        venv = gym.make_vec(ENV_ID, num_envs=b, vectorization_mode="vector_entry_point")
        action = np.tile(np.array([-0.3, -0.1], dtype=np.float32), (b, 1))
        steps = max(5, min(400, 200000 // b))
        rate = steps_per_second(venv, action, steps) * b
        batched.append({"num_envs": b, "env_steps_per_s": rate, "over_pendulum": rate / pend})
        print(f"vector B = {b:6d}: {rate:12.0f} env-steps/s ({rate / pend:8.1f}x Pendulum-v1)")
    out = {"benchmark": "env_speed", "python": platform.python_version(), "numpy": np.__version__,
           "gymnasium": gym.__version__, "cpu_count": os.cpu_count(),
           "goal": {"single_over_pendulum": ">= 0.5", "B1024_env_steps_per_s": ">= 500000",
                    "B16384_env_steps_per_s": ">= 1000000"},
           **rows, "batched": batched}
    write_json_atomic(ROOT / "benchmarks" / "results" / "env_speed.json", out)
    return out


if __name__ == "__main__":
    main()
