"""pamjoint's physics and environment package: muscle, pneumatics, joint, plant, tasks, envs.

Importing it registers the Gymnasium id ``pamjoint/FlipperStrike-v1`` (scalar env and native
vector env).
"""

__version__ = "0.1.0"

ENV_ID = "pamjoint/FlipperStrike-v1"


def _register() -> None:
    import gymnasium

    if ENV_ID not in gymnasium.registry:
        gymnasium.register(id=ENV_ID, entry_point="muscle_sim.env:FlipperStrikeEnv",
                           vector_entry_point="muscle_sim.vector_env:FlipperStrikeVectorEnv",
                           max_episode_steps=None)


_register()
