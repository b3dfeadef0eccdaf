"""A finite model of an outcome task, on a lattice of internal states.

For tasks whose only state is the internal state and whose actions are item
lotteries (Menu, Gamble, Lure...), the task's own core defines a finite MDP once
the levels are put on a lattice. Each lattice point is pushed through the real
physiology transition for every action and outcome in one batched call; the
continuous next level is then spread over the 2^K surrounding lattice points
with multilinear (barycentric) weights, which keeps the expected drift exact
even when one step moves a level by much less than the lattice spacing
(Munos & Moore 2002, "Variable resolution discretization in optimal control").
Rewards are the task's own reward channel on the exact next state, assembled
as a task step assembles them (:meth:`~needbench.envs.rewards.RewardChannel.outcome`:
lethal penalty and, under ``on_lethal="penalise"``, the level held inside its
bounds). Under ``"terminate"`` a level that leaves its lethal bounds leads to an
absorbing terminal state; under ``"penalise"`` the held level is spread over the
lattice like any other.

The model ignores the gut compartment, noise and set-point adaptation, so it
is only built for bodies without them; anything else raises ConfigError.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass

import numpy as np

from needbench.envs.errors import ConfigError, check_positive
from needbench.envs.physiology import BodyState


@dataclass(frozen=True)
class FiniteModel:
    """A finite MDP with one extra absorbing terminal state (the last index).

    Attributes:
        transition: (S, A, S) probabilities P[s, a, s'].
        reward: (S, A) expected reward of taking a in s.
        terminal: (S,) True for the absorbing death state.
        levels: (S - 1, K) the lattice points, in need units.
        set_point: (K,) set points (the observation's deviations are relative to them).
        band: (K,) comfort bands.
    """

    transition: np.ndarray
    reward: np.ndarray
    terminal: np.ndarray
    levels: np.ndarray
    set_point: np.ndarray
    band: np.ndarray
    axes: tuple[np.ndarray, ...]

    def state_of(self, observations: np.ndarray) -> np.ndarray:
        """(B,) nearest lattice state of each observation (first K entries: deviations)."""
        k = len(self.axes)
        level = np.asarray(observations)[:, :k] * self.band + self.set_point
        index = np.zeros(level.shape[0], dtype=np.int64)
        for axis, values in enumerate(self.axes):
            nearest = np.clip(np.rint((level[:, axis] - values[0]) / (values[1] - values[0])),
                              0, len(values) - 1).astype(np.int64)
            index = index * len(values) + nearest
        return index


def lattice_model(core, resolution: float = 0.25) -> FiniteModel:
    """Build the finite model of an outcome task's core.

    Args:
        core: a :class:`~needbench.envs.task.TaskCore` whose world has ``model()``
            (items with outcome probabilities and effects).
        resolution: lattice spacing in comfort-band units (> 0).
    """
    check_positive("resolution", resolution)
    body, world = core.physiology, core.world
    if not hasattr(world, "model"):
        raise ConfigError("task", type(world).__name__, "an outcome task whose world has model()")
    model = world.model()
    if not model.get("stationary", True):  # Drift's mean yields, Forewarn without weather
        raise ConfigError("task", type(world).__name__,
                          "an outcome task whose model is the step's whole outcome "
                          "(world.model() not marked stationary=False)")
    if np.any(body.delayed) or body.noisy or body.adapts:
        raise ConfigError("needs", body.names,
                          "needs with instant uptake, no noise and fixed set points "
                          "(need_overrides uptake_rate=inf, noise=0, adaptation_rate=0)")
    probabilities, effects = model["probabilities"], model["effects"]  # (A, O), (A, O, K)
    n_actions, n_outcomes, k = effects.shape

    axes = tuple(
        np.arange(low + step, high - step / 2, step)
        for low, high, step in zip(body.lethal_low, body.lethal_high, resolution * body.band,
                                   strict=True)
    )
    levels = np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1).reshape(-1, k)
    n_states = levels.shape[0]

    # One batched transition over every (state, action, outcome).
    start = np.repeat(levels, n_actions * n_outcomes, axis=0)
    intake = np.tile(effects.reshape(-1, k), (n_states, 1))
    batch = start.shape[0]
    before = BodyState(start, np.zeros_like(start), np.broadcast_to(body.set_point, start.shape))
    moved = body.transition(before, intake=intake, activity=np.zeros(batch))
    # A world may pay a palatability T per (item, outcome) (Lure): the same in every state.
    palatability = model.get("palatability")
    palatability = None if palatability is None else np.tile(
        np.asarray(palatability, np.float64).reshape(-1), n_states)
    outcome = core.reward_channel.outcome(body, core.drive, before, moved, intake=intake,
                                          task=np.zeros(batch), palatability=palatability)
    after = outcome.body
    # Under "penalise" the episode goes on from the held level: nothing dies.
    alive = outcome.alive | (core.reward_channel.on_lethal == "penalise")
    weight = np.tile(probabilities.reshape(-1), n_states)  # (batch,)
    reward = (outcome.reward * weight).reshape(n_states, n_actions, n_outcomes).sum(axis=2)

    # Multilinear weights of the next level over its 2^K surrounding lattice points.
    lower, frac = [], []
    for axis, values in enumerate(axes):
        position = np.clip((after.level[:, axis] - values[0]) / (values[1] - values[0]),
                           0, len(values) - 1)
        base = np.minimum(np.floor(position).astype(np.int64), len(values) - 2)
        lower.append(base)
        frac.append(position - base)
    size = n_states + 1
    rows = np.repeat(np.arange(n_states), n_actions * n_outcomes)
    cols = np.tile(np.repeat(np.arange(n_actions), n_outcomes), n_states)
    origin = (rows * n_actions + cols) * size  # flat offset of row (s, a) in P
    targets, shares = [origin + n_states], [weight * ~alive]  # death
    for corner in itertools.product((0, 1), repeat=k):
        index = np.zeros(batch, dtype=np.int64)
        share = weight * alive
        for axis, values in enumerate(axes):
            index = index * len(values) + lower[axis] + corner[axis]
            share = share * (frac[axis] if corner[axis] else 1.0 - frac[axis])
        targets.append(origin + index)
        shares.append(share)
    # One weighted histogram accumulates every (s, a, s') share, duplicates summed.
    transition = np.bincount(np.concatenate(targets), weights=np.concatenate(shares),
                             minlength=size * n_actions * size).reshape(size, n_actions, size)
    transition[n_states, :, n_states] = 1.0  # death is absorbing
    reward = np.concatenate([reward, np.zeros((1, n_actions))])
    terminal = np.zeros(n_states + 1, dtype=bool)
    terminal[n_states] = True
    return FiniteModel(transition, reward, terminal, levels, body.set_point.copy(),
                       body.band.copy(), axes)
