"""Adapter: the native vector env behind Stable-Baselines3's own ``VecEnv`` interface.

Optional (``pip install "pamjoint[rl]"``); nothing else in pamjoint imports it. Stable-Baselines3
expects same-step autoreset with the last observation of an ended episode in
``infos[i]["terminal_observation"]`` and ``infos[i]["TimeLimit.truncated"]`` for a cut episode;
the native vector env runs in Gymnasium's same-step mode and this class renames what it gives.
``infos[i]`` also carries ``trial`` and, at an episode's end, the trial ``metrics`` (and
``fault``), as the Gymnasium envs report them.
"""
from __future__ import annotations

import numpy as np
from gymnasium.vector import AutoresetMode
from stable_baselines3.common.vec_env.base_vec_env import VecEnv

from .vector_env import FlipperStrikeVectorEnv


class StrikeVecEnv(VecEnv):
    """``num_envs`` strike trials for Stable-Baselines3 (keyword arguments go to
    :class:`~muscle_sim.vector_env.FlipperStrikeVectorEnv`). ``seed(s)`` seeds member i with
    ``s + i``, as the Gymnasium vector envs do."""

    def __init__(self, num_envs: int = 1, config=None, max_episode_steps: int | None = None):
        self.venv = FlipperStrikeVectorEnv(num_envs, config, max_episode_steps=max_episode_steps,
                                           autoreset_mode=AutoresetMode.SAME_STEP)
        super().__init__(num_envs, self.venv.single_observation_space, self.venv.single_action_space)
        self._actions = None

    def reset(self):
        seed = self._seeds[0]
        options = self._options[0] or None
        obs, _ = self.venv.reset(seed=seed, options=options)
        self._reset_seeds()
        self._reset_options()
        return obs

    def step_async(self, actions) -> None:
        self._actions = actions

    def step_wait(self):
        obs, reward, terminated, truncated, info = self.venv.step(self._actions)
        done = terminated | truncated
        infos = [{"trial": int(info["trial"][i])} for i in range(self.num_envs)]
        if done.any():
            final = info["final_info"]
            for i in np.flatnonzero(done).tolist():
                record = infos[i]
                record["terminal_observation"] = info["final_obs"][i]
                record["TimeLimit.truncated"] = bool(truncated[i] and not terminated[i])
                record["trial"] = int(final["trial"][i])
                record["metrics"] = {k: v[i] for k, v in final["metrics"].items() if not k.startswith("_")}
                if final.get("_fault") is not None and final["_fault"][i]:
                    record["fault"] = final["fault"][i]
        return obs, reward.astype(np.float32), done, infos

    def close(self) -> None:
        self.venv.close()

    def _members(self, indices) -> list:
        return list(self._get_indices(indices))

    def get_attr(self, attr_name: str, indices=None) -> list:
        return [getattr(self.venv, attr_name) for _ in self._members(indices)]

    def set_attr(self, attr_name: str, value, indices=None) -> None:
        setattr(self.venv, attr_name, value)

    def env_method(self, method_name: str, *method_args, indices=None, **method_kwargs) -> list:
        method = getattr(self.venv, method_name)
        return [method(*method_args, **method_kwargs) for _ in self._members(indices)]

    def env_is_wrapped(self, wrapper_class, indices=None) -> list:
        return [False for _ in self._members(indices)]
