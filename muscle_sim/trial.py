"""The strike trial core: a batch of trials of one setup stepped together, behind every shell.

One :class:`TrialBatch` does what a trial is: start (member i begins trial k, on the plant of that
trial under drift, at rest at home), command (pressures requested, counted against the rating,
clipped to what the valves can give), step (one compiled control step of the physics kernel for
the whole batch), observe (sensor readings; observations scaled for learning agents), reward and
episode end (fault band of the TRUE angle, divergence, step limit) and metrics (one function,
:func:`muscle_sim.tasks.metrics_from_totals`, fed while stepping). The single env is a batch of
one, the vector env a batch of many, the run commands a batch of one that keeps its log.

Randomness is per member, in the order a lone trial draws: at its start the drift spread of its
trial, then one row of sensor noise per reading. Noise is drawn in blocks, one generator call per
block and member (:class:`NoiseStreams`); a block a trial leaves unfinished (it ended early) is
rewound exactly, so member i of a batch consumes its generator as a single env seeded alike does,
and ``gymnasium.make_vec(..., vectorization_mode="sync")`` and the native vector env agree.
"""
from __future__ import annotations

import math

import numpy as np

from .compiled import law
from .drift import drifted
from .integrate import Stepper, advance_batch
from .plant import initial_state
from .records import Rollout
from .sensors import SensorModel, readings_into
from .simulation import Setup, home_pressures
from .tasks import FAULT_PENALTY, clear_totals, fold_sample, fresh_totals, metrics_from_totals, reference, reward_at
from .yaml_input import shorten

#: Largest trial index an episode may be given (``reset(options={"trial": k})``).
MAX_TRIAL = 1_000_000

#: Observation scaling: the rate is observed in units of RATE_SCALE [rad/s], bounded at
#: RATE_BOUND [rad/s]; pressures relative to the rated pressure; the time to the strike relative
#: to the trial length.
RATE_SCALE = 10.0
RATE_BOUND = 60.0
N_OBS = 6

NO_FAULT, STOP_FAULT, DIVERGED = 0, 1, 2
STOP_TEXT = "end stop struck deeper than task.fault_depth"

#: Noise rows drawn per generator call and member.
NOISE_BLOCK = 64


def check_trial(value, field: str = "trial") -> int:
    """A trial index given by a user: a whole number in 0 .. MAX_TRIAL (one-line ValueError)."""
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)) \
            or not 0 <= value <= MAX_TRIAL:
        raise ValueError(f"{field}: {shorten(value)} is not allowed; must be a whole number from 0 to {MAX_TRIAL}")
    return int(value)


def check_actions(action, shape: tuple) -> np.ndarray:
    """Validate actions: real finite numbers of exactly ``shape``; returns them as float64.
    Anything else (wrong shape, ragged, objects, strings, complex, booleans, NaN, inf) raises a
    one-line ValueError naming what was given and what is allowed."""
    allowed = (f"must be real numbers of shape {shape} (pressure commands of muscles A and B in [-1, 1]; "
               f"values outside are clipped)")
    try:
        a = np.asarray(action)
    except (TypeError, ValueError, OverflowError):
        raise ValueError(f"action: {shorten(action)} is not allowed; {allowed}") from None
    if a.dtype.kind not in "iuf":
        raise ValueError(f"action: {shorten(action)} (dtype {a.dtype}) is not allowed; {allowed}")
    if a.shape != shape:
        raise ValueError(f"action: shape {a.shape} is not allowed; {allowed}")
    with np.errstate(over="ignore", invalid="ignore"):     # a long double past float64 becomes inf: refused
        a = a.astype(np.float64)
    if not np.all(np.isfinite(a)):
        raise ValueError(f"action: {shorten(a.tolist())} is not allowed; {allowed}, NaN and inf are refused")
    return a


@law
def commands_into(actions, full_scale, clipped_count, out):
    """Actions in [-1, 1] (clipped, clips counted per member) onto 0 .. ``full_scale`` [Pa];
    returns how many entries were not finite (then nothing is written or counted)."""
    bad = 0
    for i in range(actions.shape[0]):
        for c in range(2):
            if not math.isfinite(actions[i, c]):
                bad += 1
    if bad:
        return bad
    for i in range(actions.shape[0]):
        for c in range(2):
            a = actions[i, c]
            v = min(max(a, -1.0), 1.0)
            if v != a:
                clipped_count[i] += 1
            out[i, c] = (v + 1.0) * (0.5 * full_scale)
    return bad


#: Action dtypes the compiled path takes as they are (native byte order; numba has no float16 or
#: long double).
_COMPILED_DTYPES = (np.dtype(np.float64), np.dtype(np.float32))


def actions_to_commands(action, shape: tuple, full_scale: float, clipped_count, out) -> None:
    """Validated actions of ``shape`` ((2,) or (B, 2)) into pressure commands ``out`` (B, 2) [Pa]
    (:func:`commands_into`); a native float64 or float32 array (what RL libraries hand over) of the
    right shape takes the compiled path directly, anything else (float16, long double,
    byte-swapped, lists) is checked and converted by :func:`check_actions` first."""
    if not (type(action) is np.ndarray and action.dtype in _COMPILED_DTYPES and action.shape == shape):
        action = check_actions(action, shape)
    if commands_into(action.reshape(out.shape), full_scale, clipped_count, out):
        check_actions(action, shape)          # raises, naming the non-finite values


def observation_bounds(setup: Setup):
    """Lower and upper observation bounds (float32): angle [rad], rate / RATE_SCALE, pressures
    over the rated pressure, time to the strike over the trial length, reference angle [rad]."""
    rated = setup.rated_pressure
    top = 1.2 * max(setup.plant.pneumatics.supply_pressure, rated) / rated
    span = setup.task.trial_length
    strike = setup.task.strike_time / span
    low = np.array([-math.pi, -RATE_BOUND / RATE_SCALE, 0.0, 0.0, strike - 1.0, -math.pi], dtype=np.float32)
    high = np.array([math.pi, RATE_BOUND / RATE_SCALE, top, top, strike, math.pi], dtype=np.float32)
    return low, high


@law
def observations_into(readings, steps, ref, strike_time, dt, span, rated, low, high, out):
    """Scaled observations of each member (readings (B, 4), steps (B,)) into ``out`` (B, 6),
    clipped to the bounds: angle, rate / RATE_SCALE, p_a / rated, p_b / rated, time to the strike
    / trial length, the reference angle at this sample."""
    last = ref.shape[0] - 1
    for i in range(readings.shape[0]):
        k = steps[i]
        v = (readings[i, 0], readings[i, 1] / RATE_SCALE, readings[i, 2] / rated, readings[i, 3] / rated,
             (strike_time - k * dt) / span, ref[min(k, last)])
        for c in range(6):
            out[i, c] = min(max(v[c], low[c]), high[c])


@law
def _apply(requested, supply, rated, above, peak, applied):
    """Requested pressures [Pa] counted against the rating (samples above, peak) and clipped to
    0 .. each member's supply into ``applied``."""
    for i in range(requested.shape[0]):
        top = max(requested[i, 0], requested[i, 1])
        if top > rated:
            above[i] += 1
        peak[i] = max(peak[i], top)
        for c in range(2):
            applied[i, c] = min(max(requested[i, c], 0.0), supply[i])


#: Positions in the constants row of :func:`_account`.
_DT, _HOME, _TOL, _TURN, _STRIKE_K, _STRIKE_Q, _STRIKE_V, _N_STEPS, _LIMIT, _LOW, _HIGH, _PENALTY = range(12)


@law
def _account(y, x, k, read, active, fresh, ref, consts, totals, fault, reward, terminated, truncated):
    """Per member read this step: fold the sample into its totals; unless it just started, its
    reward (:func:`~muscle_sim.tasks.reward_at`) and end flags (fault band of the TRUE angle,
    step limit). A member not read (it diverged) ends with the fault penalty; members not
    ``active`` are left as they are. ``consts`` holds the task's numbers
    (see :meth:`TrialBatch._constants`)."""
    dt, home, tolerance, turn_time = consts[_DT], consts[_HOME], consts[_TOL], consts[_TURN]
    strike_index, strike_angle, strike_speed = int(consts[_STRIKE_K]), consts[_STRIKE_Q], consts[_STRIKE_V]
    n_steps, limit = int(consts[_N_STEPS]), int(consts[_LIMIT])
    low_band, high_band, fault_penalty = consts[_LOW], consts[_HIGH], consts[_PENALTY]
    last = ref.shape[0] - 1
    for i in range(y.shape[0]):
        if not active[i]:
            continue
        if not read[i]:
            reward[i] = -fault_penalty
            terminated[i] = True
            truncated[i] = False
            continue
        ki = k[i]
        ref_angle = ref[min(ki, last)]
        fold_sample(ki, y[i, 0], y[i, 1], y[i, 2], y[i, 3], ref_angle, dt, home, tolerance, turn_time,
                    strike_index, strike_angle, strike_speed, totals[i])
        if fresh[i]:
            reward[i] = 0.0
            terminated[i] = truncated[i] = False
            continue
        r = reward_at(ki, y[i, 0], y[i, 1], ref_angle, n_steps, strike_index, strike_speed)
        hit = x[i, 0] < low_band or x[i, 0] > high_band
        if hit:
            fault[i] = 1
        terminated[i] = hit
        truncated[i] = (not hit) and ki >= limit
        reward[i] = r - fault_penalty if hit else r


@law
def _log_rows(log, k, offset, live, values):
    """``log[i, min(k[i] + offset, last)] = values[i]`` for each member where ``live`` is true
    (``last`` the log's last sample): the recorded trial, one compiled call per step."""
    last = log.shape[1] - 1
    for i in range(k.shape[0]):
        if live[i]:
            j = min(k[i] + offset, last)
            for c in range(values.shape[1]):
                log[i, j, c] = values[i, c]


@law
def _take_rows(buf, pos, size, left, live, out, empty):
    """Copy each live member's next buffered noise row into ``out`` and return 0; if some live
    member's buffer is used up, mark those in ``empty``, take nothing and return their number."""
    count = 0
    for i in range(pos.shape[0]):
        empty[i] = live[i] and pos[i] >= size[i]
        count += empty[i]
    if count:
        return count
    for i in range(pos.shape[0]):
        if live[i]:
            for c in range(out.shape[1]):
                out[i, c] = buf[i, pos[i], c]
            pos[i] += 1
            left[i] -= 1
    return 0


@law
def _command_and_advance(requested, supply, rated, above, peak, applied, x, x_before, k, history, slots, rows, h,
                         slip, breakaway, weights, diverged):
    """One control step of the batch in one compiled call: the requested pressures counted and
    clipped (:func:`_apply`), the physics advanced (:func:`~muscle_sim.integrate.advance_batch`),
    a member that left the physical range put back to its last state, every step count raised.
    Returns the index of the first member that diverged, or -1."""
    _apply(requested, supply, rated, above, peak, applied)
    for i in range(x.shape[0]):
        for c in range(x.shape[1]):
            x_before[i, c] = x[i, c]
    first = advance_batch(x, history, applied, slots, rows, h, slip, breakaway, weights, diverged)
    if first >= 0:
        for i in range(x.shape[0]):
            if diverged[i]:
                for c in range(x.shape[1]):
                    x[i, c] = x_before[i, c]
    for i in range(k.shape[0]):
        k[i] += 1
    return first


@law
def _read_and_account(x, diverged, active, read, live, buf, pos, size, left, empty, noise, filtered, levels,
                      angle_step, blend, y, k, fresh, ref, consts, totals, fault, reward, terminated, truncated,
                      obs_consts, low, high, obs):
    """Readings of the active members that did not diverge (noise from their buffers,
    :func:`_take_rows`), folded into their totals with reward and end flags (:func:`_account`),
    and every member's observation (:func:`observations_into`; ``obs_consts`` = strike time,
    control step, trial length, rated pressure), in one compiled call. Returns the number of live members whose noise buffer is used up
    (marked in ``empty``; then nothing is done and the caller refills and calls again), else 0."""
    for i in range(x.shape[0]):
        read[i] = not diverged[i]
        live[i] = read[i] and active[i]
    if noise.shape[1] > 0:
        missing = _take_rows(buf, pos, size, left, live, noise, empty)
        if missing:
            return missing
    readings_into(x, filtered, noise, levels, angle_step, blend, live, y)
    _account(y, x, k, read, active, fresh, ref, consts, totals, fault, reward, terminated, truncated)
    for i in range(x.shape[0]):
        if active[i]:
            fresh[i] = False
    observations_into(y, k, ref, obs_consts[0], obs_consts[1], obs_consts[2], obs_consts[3], low, high, obs)
    return 0


class NoiseStreams:
    """Standard normals for each member's readings from the member's own generator, drawn in
    blocks of up to :data:`NOISE_BLOCK` rows but consumed exactly as one draw per reading would.

    A block never reaches past the readings a member's trial is expected to take; if the trial
    ends earlier, :meth:`settle` restores the generator to where the block began and redraws only
    the rows used, so what follows (the next trial's drift spread, its noise) is drawn from the
    same point as in a lone trial.
    """

    def __init__(self, members: int, width: int):
        self.width = width
        self.gens = [None] * members
        self._saved = [None] * members
        self._buf = np.zeros((members, NOISE_BLOCK, width))
        self._pos = np.zeros(members, dtype=np.int64)
        self._size = np.zeros(members, dtype=np.int64)
        self._left = np.zeros(members, dtype=np.int64)
        self._empty = np.zeros(members, dtype=np.bool_)
        self.out = np.zeros((members, width))

    def settle(self, i: int) -> None:
        """Leave member ``i``'s generator just after the rows it used (rewind an unfinished block)."""
        if self._pos[i] < self._size[i]:
            gen = self.gens[i]
            gen.bit_generator.state = self._saved[i]
            if self._pos[i]:
                gen.standard_normal((int(self._pos[i]), self.width))
        self._pos[i] = self._size[i] = 0

    def attach(self, i: int, gen: np.random.Generator, readings: int) -> None:
        """Member ``i`` draws from ``gen`` from now on and expects ``readings`` more readings."""
        if self.gens[i] is not None:
            self.settle(i)
        self.gens[i] = gen
        self._left[i] = readings

    def take(self, live) -> np.ndarray:
        """The next noise row of every member where ``live`` is true (others' rows are stale)."""
        if not self.width:
            return self.out
        while _take_rows(self._buf, self._pos, self._size, self._left, live, self.out, self._empty):
            self.refill_empty()
        return self.out

    def kernel_args(self) -> tuple:
        """``(buf, pos, size, left, empty, out)`` for :func:`_take_rows` in a fused call."""
        return self._buf, self._pos, self._size, self._left, self._empty, self.out

    def refill_empty(self) -> None:
        """Draw the next block of every member marked empty by :func:`_take_rows`."""
        for i in np.flatnonzero(self._empty).tolist():
            self._refill(i)

    def _refill(self, i: int) -> None:
        gen = self.gens[i]
        n = int(min(NOISE_BLOCK, max(self._left[i], 1)))
        self._saved[i] = gen.bit_generator.state
        gen.standard_normal(out=self._buf[i, :n])
        self._size[i], self._pos[i] = n, 0


class TrialBatch:
    """``members`` strike trials of ``setup`` stepped together (see the module docstring).

    Per member: ``k`` (samples taken since its start), ``trial`` (its trial index), ``y`` (its
    latest readings [angle, rate, p_a, p_b] in SI), ``obs`` (its scaled observation, float32),
    ``reward``, ``terminated``, ``truncated``.
    ``limit`` caps the steps of a trial (a time limit shorter than the trial); ``record`` keeps
    every member's readings and applied commands for :meth:`rollout`.
    """

    def __init__(self, setup: Setup, members: int = 1, limit: int | None = None, record: bool = False):
        task = setup.task
        self.setup, self.task, self.members = setup, task, int(members)
        n = self.members
        self.set_limit(limit)
        plant = setup.plant
        self.stepper = Stepper(plant, task.dt, task.n_substeps, batch=n)
        self.sensors = SensorModel(setup.sensors, task.dt, n)
        self.noise = NoiseStreams(n, self.sensors.n_noisy)
        self.params = [plant] * n
        self._base_start = None
        hold, x0 = self._start_state(plant)
        self.p_hold = np.tile(hold, (n, 1))
        self.x0 = np.tile(x0, (n, 1))
        self.supply = np.full(n, plant.pneumatics.supply_pressure)
        self.ref = reference(task, task.times)[0]
        self.k = np.zeros(n, dtype=np.int64)
        self.trial = np.zeros(n, dtype=np.int64)
        self.y = np.zeros((n, 4))
        self.totals = fresh_totals(n)
        self.fault = np.zeros(n, dtype=np.int8)
        self._fault_at = np.zeros(n)
        self.reward = np.zeros(n)
        self.terminated = np.zeros(n, dtype=np.bool_)
        self.truncated = np.zeros(n, dtype=np.bool_)
        self.applied = np.zeros((n, 2))
        self.above_rated = np.zeros(n, dtype=np.int64)
        self.peak_requested = np.zeros(n)
        self._fresh = np.zeros(n, dtype=np.bool_)
        self._read = np.ones(n, dtype=np.bool_)
        low, high = observation_bounds(setup)
        self._low, self._high = low.astype(float), high.astype(float)
        self._obs_consts = np.array([task.strike_time, task.dt, task.trial_length, setup.rated_pressure])
        self.obs = np.zeros((n, N_OBS), dtype=np.float32)
        self._live = np.ones(n, dtype=np.bool_)
        self._rated = float(setup.rated_pressure)
        self._all = np.ones(n, dtype=np.bool_)
        self._x_before = np.zeros_like(self.stepper._x)
        self.record = record
        if record:
            self._y_log = np.zeros((n, task.n_steps + 1, 4))
            self._u_log = np.zeros((n, task.n_steps + 1, 2))

    def set_limit(self, limit: int | None) -> None:
        """Cap the steps of the trials begun from now on (None: the whole trial)."""
        n_steps = self.task.n_steps
        self.limit = n_steps if limit is None else max(1, min(int(limit), n_steps))
        self._consts = self._constants()

    def _constants(self) -> np.ndarray:
        t, j = self.task, self.setup.plant.joint
        return np.array([t.dt, t.home_angle, t.settle_tolerance, t.turn_time, t.strike_index, t.strike_angle,
                         t.strike_speed, t.n_steps, self.limit, j.lower_stop - t.fault_depth,
                         j.upper_stop + t.fault_depth, FAULT_PENALTY])

    def _start_state(self, params):
        """Home pressures and rest state at home of a plant (the configured plant's are kept)."""
        if params is self.setup.plant and self._base_start is not None:
            return self._base_start
        hold = np.array(home_pressures(params, self.task))
        start = hold, initial_state(params, self.task.home_angle, hold)
        if params is self.setup.plant:
            self._base_start = start
        return start

    def begin(self, members, trials, rngs=None) -> None:
        """Members ``members`` (indices) begin trials ``trials`` at rest at home; ``rngs`` gives
        each its generator (None: go on drawing from the one it has). Their first readings come
        with the next :meth:`read`."""
        members = np.asarray(members, dtype=np.int64).reshape(-1)
        trials = np.broadcast_to(np.asarray(trials, dtype=np.int64), members.shape)
        for j, (i, trial) in enumerate(zip(members.tolist(), trials.tolist())):
            if rngs is not None:
                self.noise.attach(i, rngs[j], self.limit + 1)
            else:
                self.noise.attach(i, self.noise.gens[i], self.limit + 1)
            params = drifted(self.setup.plant, self.setup.drift, trial, self.noise.gens[i])
            if params is not self.params[i]:
                self.params[i] = params
                self.stepper.set_member(i, params)
                self.p_hold[i], self.x0[i] = self._start_state(params)
                self.supply[i] = params.pneumatics.supply_pressure
        mask = np.zeros(self.members, dtype=np.bool_)
        mask[members] = True
        self.stepper.reset_some(mask, self.x0[mask], self.p_hold[mask])
        self.stepper.diverged[mask] = False
        self.sensors.filtered[mask] = self.p_hold[mask]
        clear_totals(self.totals, mask)
        self.k[mask] = 0
        self.trial[mask] = trials
        self.fault[mask] = NO_FAULT
        self.above_rated[mask] = 0
        self.peak_requested[mask] = 0.0
        self.applied[mask] = self.p_hold[mask]
        self._fresh |= mask

    def step(self, requested) -> None:
        """Every member advances one control step under the pressures ``requested`` (members, 2)
        [Pa]: counted against the rating, clipped to 0 .. supply. A member that leaves the
        physical range keeps its last state and ends with a divergence fault at the next read."""
        if _command_and_advance(requested, self.supply, self._rated, self.above_rated, self.peak_requested,
                                self.applied, self.stepper._x, self._x_before, self.k,
                                *self.stepper.kernel_args()) >= 0:
            bad = self.stepper.diverged
            self.fault[bad] = DIVERGED
            self._fault_at[bad] = self.k[bad] * self.task.dt
        if self.record:
            _log_rows(self._u_log, self.k, -1, self._all, self.applied)

    def read(self, members=None) -> np.ndarray:
        """Readings of every member (or those where the mask ``members`` is true) that did not
        just diverge; folds them into the metrics and sets ``reward``, ``terminated`` and
        ``truncated`` (members that just began: reward 0, not done). Returns ``y`` (members, 4),
        the batch's own array."""
        active = self._all if members is None else np.asarray(members, dtype=np.bool_)
        sensors, noise = self.sensors, self.noise
        while _read_and_account(self.stepper._x, self.stepper.diverged, active, self._read, self._live,
                                *noise.kernel_args(), sensors.filtered, sensors.levels, sensors.angle_step,
                                sensors.blend, self.y, self.k, self._fresh, self.ref, self._consts, self.totals,
                                self.fault, self.reward, self.terminated, self.truncated, self._obs_consts,
                                self._low, self._high, self.obs):
            noise.refill_empty()
        if self.record:
            _log_rows(self._y_log, self.k, 0, self._live, self.y)
        return self.y

    def fault_text(self, i: int):
        """What ended member ``i``'s trial in a fault, or None."""
        code = int(self.fault[i])
        if code == STOP_FAULT:
            return STOP_TEXT
        if code == DIVERGED:
            return f"simulation diverged: the state left the physical range at t = {self._fault_at[i]:.4f} s"
        return None

    def metrics(self, i: int) -> dict:
        """Member ``i``'s trial metrics so far (:func:`~muscle_sim.tasks.metrics_from_totals`)."""
        return metrics_from_totals(self.task, self.totals[i], self.fault_text(i))

    def logged_reading(self, i: int = 0) -> np.ndarray:
        """Member ``i``'s latest readings as a view into its log (``record=True``), which later
        steps leave as it is."""
        return self._y_log[i, min(int(self.k[i]), self.task.n_steps)]

    def state(self, i: int = 0) -> np.ndarray:
        """Member ``i``'s true plant state now (simulation only; a rig cannot give it)."""
        return self.stepper._x[i]

    def rollout(self, i: int = 0, controller: str = "", seed=None) -> Rollout:
        """Member ``i``'s recorded trial (``record=True``) as a :class:`~muscle_sim.records.Rollout`;
        the command of the last sample repeats the one before (it acts on nothing)."""
        if not self.record:
            raise RuntimeError("rollout: this trial batch keeps no log (record=False)")
        taken = int(self.k[i]) + (0 if self.fault[i] == DIVERGED else 1)
        n = max(1, min(taken, self.task.n_steps + 1))
        t = np.arange(n) * self.task.dt
        u = self._u_log[i, :n].copy()
        if n > 1:
            u[n - 1] = u[n - 2]
        ref, _, _ = reference(self.task, t)
        meta = {"config_hash": self.setup.config.digest, "seed": seed, "controller": controller,
                "trial": int(self.trial[i]),
                "supply_pressure_kpa": self.params[i].pneumatics.supply_pressure / 1e3}
        return Rollout(t=t, measured=self._y_log[i, :n].copy(), command=u, reference=ref, metadata=meta)
