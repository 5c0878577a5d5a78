"""Exceptions raised by pamjoint; each subclasses a built-in so callers can catch broadly."""


class ParameterError(ValueError):
    """A physical parameter is outside its allowed range (message names field, value, range)."""


class ConfigError(ValueError):
    """A config file or value is invalid (message names the key path, the value, what is allowed)."""


class SimulationDiverged(RuntimeError):
    """The integrator produced a non-finite or runaway state."""


class DataError(ValueError):
    """A CSV log or profile is malformed (message names the row and column)."""
