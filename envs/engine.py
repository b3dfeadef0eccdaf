"""The compiled heart of every task: what a step does to B bodies once the world has acted.

A task family's kernels (in ``envs/tasks/<family>.py``) loop over copies to
let the world act (intakes, activity, ambient conditions, forcing, payoff,
the perceived outcome, the palatability of what was consumed), then call
:func:`settle_all`, which advances every body, decides survival, scores drive
and reward and sets the episode flags;
then they write the observation, internal part by :func:`observe_internal`.

All the arrays a kernel needs travel in one tuple, the *engine*, built by
:class:`~needbench.envs.task.TaskCore`; the constants below name its entries.
Everything is preallocated, so a step allocates nothing, and the Python shell
around the kernels only validates actions and fills ``info``.
"""

from __future__ import annotations

import math

import numpy as np

from needbench.envs.compiled import inline_kernel, kernel
from needbench.envs.drives import drive_of
from needbench.envs.physiology import BAND, advance_bodies, initial_body
from needbench.envs.rewards import PENALISE, settle_batch

# Entries of the engine tuple. Per copy, (B, K) or (B,):
LEVEL, GUT, SET_POINT, DRIVE = 0, 1, 2, 3  # the body and its current drive D(h_t)
INTAKE, ACTIVITY, AMBIENT, FORCING, TASK, PERCEIVED = 4, 5, 6, 7, 8, 9  # what the world did
REWARD, INTERNAL, ALIVE, TERMINATED, TRUNCATED, CLOCK = 10, 11, 12, 13, 14, 15  # the outcome
DEVIATION, IN_BAND, OBSERVATION = 16, 17, 18  # (B, K), (B,), (B, K + W) float32
# Constants of the task:
COEFFICIENTS, COUPLING, COUPLING_BELOW, BODY_FLAGS = 19, 20, 21, 22  # the physiology
DRIVE_TABLE, DRIVE_EXPONENTS, CHANNEL, BIAS = 23, 24, 25, 26  # drive and reward channel
OPTIONS = 27  # float64 (3,): max_steps, deviation limit, observation offset of world features
USES_AMBIENT, HAS_PERCEIVED = 28, 29  # bool (1,): which world outputs are read
KEYS, COUNTERS = 30, 31  # the copies' random streams
SCRATCH = 32  # (3, K) work rows
LEVEL_BEFORE, SET_POINT_BEFORE = 33, 34  # (B, K) the body before the step
FAULT = 35  # int64 (2,): copy and need of the first non-finite level of a step, or -1
PALATABILITY = 36  # (B,) T_t of what the world served each copy this step (reward units)
ENGINE_SIZE = 37
# Entries of OPTIONS.
MAX_STEPS, DEVIATION_LIMIT, WORLD_OFFSET = 0, 1, 2


@inline_kernel
def _internal_state(engine, b):
    """Deviation (band units) and in-band flag of copy ``b`` from its level."""
    level, set_point, deviation = engine[LEVEL], engine[SET_POINT], engine[DEVIATION]
    coefficients = engine[COEFFICIENTS]
    inside = True
    for k in range(level.shape[1]):
        gap = level[b, k] - set_point[b, k]
        deviation[b, k] = gap / coefficients[BAND, k]
        if not abs(gap) <= coefficients[BAND, k]:
            inside = False
    engine[IN_BAND][b] = inside


@kernel
def settle_all(engine):
    """Advance every body one step after the world has acted, and score the step."""
    level, set_point, scratch = engine[LEVEL], engine[SET_POINT], engine[SCRATCH]
    before, set_point_before = engine[LEVEL_BEFORE], engine[SET_POINT_BEFORE]
    for b in range(level.shape[0]):
        for k in range(level.shape[1]):
            before[b, k] = level[b, k]
            set_point_before[b, k] = set_point[b, k]
    advance_bodies(level, engine[GUT], set_point, engine[INTAKE], engine[ACTIVITY],
                   engine[AMBIENT], engine[FORCING], engine[USES_AMBIENT][0],
                   engine[COEFFICIENTS], engine[COUPLING], engine[COUPLING_BELOW],
                   engine[BODY_FLAGS], engine[KEYS], engine[COUNTERS], scratch[0:2])
    # A level that is not a finite number means the declared dynamics broke down
    # (an overflow, say): the shell reports the first one, naming the need.
    fault = engine[FAULT]
    fault[0] = fault[1] = -1
    for b in range(level.shape[0]):
        for k in range(level.shape[1]):
            if fault[0] < 0 and not math.isfinite(level[b, k]):
                fault[0], fault[1] = b, k
    settle_batch(before, set_point_before, level, set_point, engine[INTAKE], engine[PERCEIVED],
                 engine[HAS_PERCEIVED][0], engine[TASK], engine[PALATABILITY], engine[DRIVE],
                 engine[COEFFICIENTS],
                 engine[CHANNEL], engine[BIAS], engine[DRIVE_TABLE], engine[DRIVE_EXPONENTS],
                 scratch[2:3], engine[REWARD], engine[INTERNAL], engine[ALIVE])
    max_steps = engine[OPTIONS][MAX_STEPS]
    terminate = engine[CHANNEL][PENALISE] == 0.0  # a lethal level ends the episode
    clock, alive = engine[CLOCK], engine[ALIVE]
    terminated, truncated = engine[TERMINATED], engine[TRUNCATED]
    for b in range(level.shape[0]):
        clock[b] += 1
        ended = terminate and not alive[b]
        terminated[b] = ended
        truncated[b] = clock[b] >= max_steps and not ended
        _internal_state(engine, b)


@kernel
def reset_body(engine, b):
    """A fresh body for copy ``b`` (its stream was rekeyed): levels, drive, clock."""
    level, set_point = engine[LEVEL], engine[SET_POINT]
    initial_body(b, level, engine[GUT], set_point, engine[COEFFICIENTS], engine[KEYS],
                 engine[COUNTERS])
    engine[DRIVE][b] = drive_of(level, b, set_point, b, engine[DRIVE_TABLE],
                                engine[DRIVE_EXPONENTS])
    engine[CLOCK][b] = 0
    _internal_state(engine, b)


@inline_kernel
def observe_internal(engine, b):
    """Write copy ``b``'s deviations, clipped to the observation bounds, as float32."""
    deviation, observation = engine[DEVIATION], engine[OBSERVATION]
    limit = engine[OPTIONS][DEVIATION_LIMIT]
    for k in range(deviation.shape[1]):
        observation[b, k] = np.float32(min(max(deviation[b, k], -limit), limit))


@kernel
def refresh(engine):
    """Recompute drive, deviation and in-band flags after the bodies were set from outside."""
    level, set_point = engine[LEVEL], engine[SET_POINT]
    for b in range(level.shape[0]):
        engine[DRIVE][b] = drive_of(level, b, set_point, b, engine[DRIVE_TABLE],
                                    engine[DRIVE_EXPONENTS])
        _internal_state(engine, b)


@kernel
def box_violation(values, low, high):
    """0 if every value is finite and inside [low, high] (flat arrays of one
    length), 1 if one is NaN or infinite, 2 if one is outside the bounds."""
    for i in range(values.shape[0]):
        value = values[i]
        if not math.isfinite(value):
            return 1
        if value < low[i] or value > high[i]:
            return 2
    return 0


@kernel
def discrete_violation(values, start, count):
    """True if some action is outside start .. start + count - 1."""
    for i in range(values.shape[0]):
        if values[i] < start or values[i] >= start + count:
            return True
    return False


@kernel
def clear_step(engine, copies, outcome):
    """Copies (indices) just reset: their step rows become those of a reset (reward
    parts and intake zero, alive), and with ``outcome`` their reward and end flags
    too (the next-step autoreset's step that only resets)."""
    intake, internal, task, alive = engine[INTAKE], engine[INTERNAL], engine[TASK], \
        engine[ALIVE]
    reward, terminated, truncated = engine[REWARD], engine[TERMINATED], engine[TRUNCATED]
    for i in range(copies.shape[0]):
        b = copies[i]
        internal[b] = 0.0
        task[b] = 0.0
        alive[b] = True
        for k in range(intake.shape[1]):
            intake[b, k] = 0.0
        if outcome:
            reward[b] = 0.0
            terminated[b] = False
            truncated[b] = False
