"""Train an off-the-shelf RL agent (Stable-Baselines3 PPO, or SAC) on the strike env and compare
it with pamjoint's learner at equal numbers of trials.

Needs the optional extra: ``pip install -e ".[rl]"`` (Stable-Baselines3 and PyTorch; install the
CPU build of PyTorch first if you have no GPU). Usage::

    python examples/train_sb3.py --trials 300 --out runs/rl-example.json

One trial is one episode (one strike of ``task.trial_length``). The agent trains on ``--envs``
members of the native vector env (through :mod:`muscle_sim.sb3_vec_env`). No observation
normaliser is used: the env scales its observations itself. The reward is scaled by a running
estimate of the return's spread (Stable-Baselines3's ``VecNormalize`` with ``norm_obs=False``,
unclipped), and the discount and GAE factor are long (0.999, 0.99): the strike step, where most of
the return is, lies 30 to 100 ms of valve, chamber and inertia lag after the actions that set it.
By default the agent's action is a correction added to the model-only feedforward's action
(residual policy learning); ``--from-scratch`` gives it the whole command.

After every ``--eval-every`` trials of experience the deterministic policy runs one evaluation
episode on a fixed seed, and the mean return of the training episodes since the last evaluation
is recorded. The learner (``pamjoint tune``, norm-optimal ILC on the prior) runs
``--tune-trials`` trials on the same config; its profile of each trial is replayed in the env on
the same evaluation seed, so both are scored by the env's return and RMS tracking error.
"""
from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from controllers.base import PressureProfile  # noqa: E402
from controllers.feedforward import ReplayProfile, model_only_profile  # noqa: E402
from controllers.tuning import tune  # noqa: E402
from muscle_sim.env import FlipperStrikeEnv  # noqa: E402
from muscle_sim.records import write_json_atomic  # noqa: E402
from muscle_sim.simulation import Setup  # noqa: E402

EVAL_SEED = 12345


def episode(env: FlipperStrikeEnv, act) -> dict:
    """One evaluation episode on the fixed seed; ``act(obs, k)`` gives the action."""
    obs, _ = env.reset(seed=EVAL_SEED)
    total, k = 0.0, 0
    while True:
        obs, reward, terminated, truncated, info = env.step(act(obs, k))
        total += reward
        k += 1
        if terminated or truncated:
            m = info["metrics"]
            return {"return": total, "rms_error_deg": m["rms_error_deg"], "fault": m["fault"],
                    "strike_angle_error_deg": m["strike_angle_error_deg"],
                    "strike_speed_error_pct": m["strike_speed_error_pct"]}


def replay_actions(env: FlipperStrikeEnv, profile):
    """A pressure profile as env actions (commands over the rated pressure onto [-1, 1])."""
    controller = ReplayProfile(profile)
    controller.reset(env.setup)
    half = 0.5 * env.setup.rated_pressure

    def act(obs, k):
        u = controller.command(k, k * env.setup.task.dt, None)
        return (np.asarray(u, dtype=float) / half - 1.0).astype(np.float32)
    return act


def learner_curve(config: str, trials: int, seed: int) -> list:
    setup = Setup.from_config(config)
    env = FlipperStrikeEnv(config)
    curve = []
    with tempfile.TemporaryDirectory() as tmp:
        tune(setup, "norm-optimal", trials, seed, Path(tmp))
        for i in range(trials):
            profile = PressureProfile.read_csv(Path(tmp) / "profiles" / f"profile-{i:04d}.csv")
            curve.append({"trials": i + 1, **episode(env, replay_actions(env, profile))})
    return curve


#: Residual mode: the agent's action in [-1, 1] is added, times this, to the model-only
#: feedforward's action (so +-1 is +-RESIDUAL_SCALE x half the rated pressure).
RESIDUAL_SCALE = 0.5


def feedforward_actions(setup) -> np.ndarray:
    """The model-only feedforward (inverse of the prior) as env actions, one row per step."""
    commands = model_only_profile(setup).commands
    return commands / (0.5 * setup.rated_pressure) - 1.0


def agent_curve(config: str, trials: int, envs: int, every: int, seed: int, algo: str, residual: bool) -> list:
    import torch
    from stable_baselines3 import PPO, SAC
    from stable_baselines3.common.callbacks import BaseCallback

    torch.set_num_threads(1)          # small networks: one thread is fastest and leaves the other core free

    from muscle_sim.sb3_vec_env import StrikeVecEnv

    from stable_baselines3.common.vec_env import VecEnvWrapper, VecMonitor, VecNormalize

    raw = StrikeVecEnv(envs, config)
    raw.seed(seed)
    steps_per_trial = raw.venv.setup.task.n_steps
    base = feedforward_actions(raw.venv.setup) if residual else np.zeros((steps_per_trial, 2))
    scale = RESIDUAL_SCALE if residual else 1.0

    class OnFeedforward(VecEnvWrapper):
        """The agent's action as a correction of the feedforward's action at each member's step
        (residual policy learning, common practice in robot learning); identity when not residual."""

        def __init__(self, venv):
            super().__init__(venv)
            self.k = np.zeros(venv.num_envs, dtype=np.int64)

        def reset(self):
            self.k[:] = 0
            return self.venv.reset()

        def step_async(self, actions):
            self.venv.step_async(base[np.minimum(self.k, steps_per_trial - 1)] + scale * np.asarray(actions))

        def step_wait(self):
            obs, reward, done, infos = self.venv.step_wait()
            self.k = np.where(done, 0, self.k + 1)
            return obs, reward, done, infos

    watched = VecMonitor(OnFeedforward(raw))   # the return of every training episode, before any scaling
    # rewards scaled by a running estimate of the return's spread (the strike step alone can cost
    # hundreds); observations are NOT normalised: the env scales them itself
    # a horizon of about 200 steps (0.4 s) spans the swing from its start to the strike
    gamma = 0.999
    # no clipping of the scaled reward: the strike step is where most of the return is
    venv = VecNormalize(watched, norm_obs=False, norm_reward=True, gamma=gamma, clip_reward=np.inf)
    if algo == "ppo":
        # conservative updates (small learning rate, early stop on the KL divergence): the strike
        # step's large penalty otherwise throws the policy off what it has learned
        model = PPO("MlpPolicy", venv, n_steps=steps_per_trial, batch_size=steps_per_trial, learning_rate=1e-4,
                    gamma=gamma, gae_lambda=0.99, n_epochs=10, target_kl=0.02, seed=seed, device="cpu",
                    verbose=0, policy_kwargs={"log_std_init": -2.0 if residual else -1.0})
    else:
        # one gradient step per env step of each member (train_freq 1, gradient_steps = members)
        model = SAC("MlpPolicy", venv, learning_rate=3e-4, buffer_size=200_000, learning_starts=2 * steps_per_trial,
                    batch_size=256, gamma=gamma, train_freq=1, gradient_steps=1, seed=seed, device="cpu", verbose=0)
    env = FlipperStrikeEnv(config)
    curve = []

    window = []                       # returns of the training episodes since the last evaluation

    def evaluate(done_trials):
        def act(obs, k):
            return base[min(k, steps_per_trial - 1)] + scale * model.predict(obs, deterministic=True)[0]

        row = {"trials": done_trials, **episode(env, act),
               "training_return_mean": float(np.mean(window)) if window else None,
               "policy_std": (np.exp(model.policy.log_std.detach().numpy()).tolist()
                              if hasattr(model.policy, "log_std") else None)}
        curve.append(row)
        window.clear()
        mean = "-" if row["training_return_mean"] is None else f"{row['training_return_mean']:9.2f}"
        print(f"agent after {done_trials:4d} trials: training episodes' mean return {mean}; evaluation return "
              f"{row['return']:9.2f}, RMS {row['rms_error_deg']:6.2f} deg; policy std {row['policy_std']}", flush=True)

    class Trials(BaseCallback):
        def __init__(self):
            super().__init__()
            self.trials, self.next_eval = 0, every

        def _on_step(self) -> bool:
            for info in self.locals["infos"]:
                if "episode" in info:
                    window.append(float(info["episode"]["r"]))
            self.trials += int(np.sum(self.locals["dones"]))
            if self.trials >= self.next_eval:
                evaluate(self.trials)
                self.next_eval += every
            return self.trials < trials

    evaluate(0)
    model.learn(total_timesteps=10 ** 9, callback=Trials())
    return curve


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--config", default=str(ROOT / "configs" / "flipper.yaml"))
    ap.add_argument("--algo", choices=("ppo", "sac"), default="ppo", help="Stable-Baselines3 algorithm")
    ap.add_argument("--trials", type=int, default=300, help="training trials (episodes) of the agent")
    ap.add_argument("--envs", type=int, default=4, help="members of the vector env the agent trains on")
    ap.add_argument("--eval-every", type=int, default=20, help="evaluate the agent every this many trials")
    ap.add_argument("--tune-trials", type=int, default=12, help="trials of the learner")
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--from-scratch", action="store_true",
                    help="the agent's action is the whole command (default: a correction of the model-only "
                         "feedforward, residual policy learning)")
    ap.add_argument("--out", default="runs/rl-example.json", help="result JSON (the README quotes examples/results/)")
    args = ap.parse_args(argv)
    for name in ("trials", "envs", "eval_every", "tune_trials"):
        if getattr(args, name) < 1:
            ap.error(f"--{name.replace('_', '-')}: {getattr(args, name)} is not allowed; must be >= 1")
    start = time.perf_counter()
    learner = learner_curve(args.config, args.tune_trials, args.seed)
    tune_s = time.perf_counter() - start
    for r in learner:
        print(f"learner after {r['trials']:4d} trials: return {r['return']:9.2f}, RMS {r['rms_error_deg']:6.2f} deg")
    start = time.perf_counter()
    agent = agent_curve(args.config, args.trials, args.envs, args.eval_every, args.seed, args.algo,
                        not args.from_scratch)
    agent_s = time.perf_counter() - start
    at_equal = [a for a in agent if a["trials"] <= args.tune_trials][-1]
    result = {"config": args.config, "seed": args.seed, "eval_seed": EVAL_SEED, "agent": f"stable-baselines3 {args.algo.upper()}",
              "observation_normaliser": False, "reward_normaliser": True,
              "mode": "from scratch" if args.from_scratch else f"residual on the model-only feedforward (x{RESIDUAL_SCALE})", "learner": learner, "agent_curve": agent,
              "learner_wall_s": tune_s, "agent_wall_s": agent_s,
              "at_equal_trials": {"trials": args.tune_trials, "learner": learner[-1], "agent": at_equal},
              "agent_first_return": agent[0]["return"], "agent_best_return": max(a["return"] for a in agent),
              "agent_last_return": agent[-1]["return"],
              "training_return_first_window": agent[1]["training_return_mean"] if len(agent) > 1 else None,
              "training_return_last_window": agent[-1]["training_return_mean"]}
    write_json_atomic(Path(args.out), result)
    print(f"after {args.tune_trials} trials: learner RMS {learner[-1]['rms_error_deg']:.3f} deg (return "
          f"{learner[-1]['return']:.2f}); agent RMS {at_equal['rms_error_deg']:.2f} deg (return {at_equal['return']:.2f})")
    print(f"agent: evaluation return {agent[0]['return']:.2f} untrained -> {agent[-1]['return']:.2f} after "
          f"{agent[-1]['trials']} trials (best {result['agent_best_return']:.2f}); training episodes' mean return "
          f"{result['training_return_first_window']} in the first window -> {result['training_return_last_window']} "
          f"in the last; wrote {args.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
