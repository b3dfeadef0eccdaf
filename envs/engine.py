"""The compiled heart of every task: what a step does to B bodies once the world has acted.

A task family's kernels (in ``envs/tasks/<family>.py``) loop over copies to
let the world act (intakes, activity, ambient conditions, forcing, payoff,
the perceived outcome), then call :func:`settle_all`, which advances every
body, decides survival, scores drive and reward and sets the episode flags;
then they write the observation, internal part by :func:`observe_internal`.

All the arrays a kernel needs travel in one tuple, the *engine*, built by
:class:`~needbench.envs.task.TaskCore`; the constants below name its entries.
Everything is preallocated, so a step allocates nothing, and the Python shell
around the kernels only validates actions and fills ``info``.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from needbench.envs.drives import drive_of
from needbench.envs.physiology import BAND, advance_body, initial_body
from needbench.envs.rewards import PENALISE, settle

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
SCRATCH = 32  # (5, K) work rows
ENGINE_SIZE = 33
# Entries of OPTIONS.
MAX_STEPS, DEVIATION_LIMIT, WORLD_OFFSET = 0, 1, 2


@njit(cache=True)
def clear_effects(engine, b):
    """Zero what the world does to copy ``b`` before the world acts."""
    intake, activity, ambient, forcing = engine[INTAKE], engine[ACTIVITY], engine[AMBIENT], \
        engine[FORCING]
    task, perceived = engine[TASK], engine[PERCEIVED]
    activity[b] = 0.0
    task[b] = 0.0
    for k in range(intake.shape[1]):
        intake[b, k] = 0.0
        ambient[b, k] = 0.0
        forcing[b, k] = 0.0
        perceived[b, k] = 0.0


@njit(cache=True)
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


@njit(cache=True)
def settle_all(engine):
    """Advance every body one step after the world has acted, and score the step."""
    level, gut, set_point = engine[LEVEL], engine[GUT], engine[SET_POINT]
    drive, scratch = engine[DRIVE], engine[SCRATCH]
    coefficients, options = engine[COEFFICIENTS], engine[OPTIONS]
    max_steps = options[MAX_STEPS]
    terminate = engine[CHANNEL][PENALISE] == 0.0  # a lethal level ends the episode
    # Rows: the level and set point before the step (the sensory channel reads
    # them), the body's two work rows, the reward's work row.
    before, set_point_before, body_scratch, work = scratch[0], scratch[1], scratch[2:4], scratch[4]
    for b in range(level.shape[0]):
        for k in range(level.shape[1]):
            before[k] = level[b, k]
            set_point_before[k] = set_point[b, k]
        advance_body(b, level, gut, set_point, engine[INTAKE], engine[ACTIVITY], engine[AMBIENT],
                     engine[FORCING], engine[USES_AMBIENT][0], coefficients, engine[COUPLING],
                     engine[COUPLING_BELOW], engine[BODY_FLAGS], engine[KEYS], engine[COUNTERS],
                     body_scratch)
        reward, internal, drive_after, alive = settle(
            b, before, set_point_before, level, set_point, engine[INTAKE], engine[PERCEIVED],
            engine[HAS_PERCEIVED][0], engine[TASK], drive[b], coefficients, engine[CHANNEL],
            engine[BIAS], engine[DRIVE_TABLE], engine[DRIVE_EXPONENTS], work)
        drive[b] = drive_after
        engine[REWARD][b] = reward
        engine[INTERNAL][b] = internal
        engine[ALIVE][b] = alive
        clock = engine[CLOCK]
        clock[b] += 1
        ended = terminate and not alive
        engine[TERMINATED][b] = ended
        engine[TRUNCATED][b] = clock[b] >= max_steps and not ended
        _internal_state(engine, b)


@njit(cache=True)
def reset_body(engine, b):
    """A fresh body for copy ``b`` (its stream was rekeyed): levels, drive, clock."""
    level, set_point = engine[LEVEL], engine[SET_POINT]
    initial_body(b, level, engine[GUT], set_point, engine[COEFFICIENTS], engine[KEYS],
                 engine[COUNTERS])
    engine[DRIVE][b] = drive_of(level[b], set_point[b], engine[DRIVE_TABLE],
                                engine[DRIVE_EXPONENTS])
    engine[CLOCK][b] = 0
    _internal_state(engine, b)


@njit(cache=True)
def observe_internal(engine, b):
    """Write copy ``b``'s deviations, clipped to the observation bounds, as float32."""
    deviation, observation = engine[DEVIATION], engine[OBSERVATION]
    limit = engine[OPTIONS][DEVIATION_LIMIT]
    for k in range(deviation.shape[1]):
        observation[b, k] = np.float32(min(max(deviation[b, k], -limit), limit))


@njit(cache=True)
def refresh(engine):
    """Recompute drive, deviation and in-band flags after the bodies were set from outside."""
    level, set_point = engine[LEVEL], engine[SET_POINT]
    for b in range(level.shape[0]):
        engine[DRIVE][b] = drive_of(level[b], set_point[b], engine[DRIVE_TABLE],
                                    engine[DRIVE_EXPONENTS])
        _internal_state(engine, b)
