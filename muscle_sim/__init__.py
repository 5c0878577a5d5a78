"""pamjoint's physics and environment package: muscle, pneumatics, joint, plant, tasks, envs."""

__version__ = "0.1.0"
