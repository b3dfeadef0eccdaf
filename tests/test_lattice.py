"""The lattice model of outcome tasks: a proper MDP whose expected drift is exact."""

import gymnasium as gym
import numpy as np
import pytest

import needbench.envs  # noqa: F401  (registers the tasks)
from needbench.envs.errors import ConfigError


@pytest.fixture(scope="module")
def menu_model():
    env = gym.make("needbench/Menu-v0")
    return env.unwrapped.core, env.unwrapped.core.finite_model(resolution=0.5)


def test_rows_are_distributions_and_death_absorbs(menu_model):
    _, model = menu_model
    assert np.allclose(model.transition.sum(axis=2), 1.0)
    assert model.transition.min() >= 0
    death = len(model.terminal) - 1
    assert model.terminal[death] and np.all(model.transition[death, :, death] == 1.0)


def test_expected_next_level_equals_the_core_transition(menu_model):
    # Source: Munos & Moore (2002): barycentric (multilinear) interpolation keeps
    # the expected next state equal to the true next state inside the lattice.
    core, model = menu_model
    world = core.world.model()
    inner = np.all(np.abs(model.levels) <= 4.0, axis=1)  # away from the lethal edge
    for action in range(model.reward.shape[1]):
        expected = model.transition[:-1, action, :-1] @ model.levels
        outcomes = world["effects"][action]
        probabilities = world["probabilities"][action]
        drain = np.array([n.drain for n in core.physiology.needs])
        truth = sum(p * (model.levels + effect - drain * core.physiology.dt)
                    for p, effect in zip(probabilities, outcomes, strict=True))
        assert np.allclose(expected[inner], truth[inner], atol=1e-9)


def test_state_of_maps_observations_to_lattice_points(menu_model):
    core, model = menu_model
    picks = np.array([0, 17, len(model.levels) // 2, len(model.levels) - 1])
    deviations = (model.levels[picks] - model.set_point) / model.band
    observations = np.concatenate([deviations, np.zeros((4, 2))], axis=1)
    assert np.array_equal(model.state_of(observations), picks)


def test_refuses_tasks_it_cannot_model():
    with pytest.raises(ConfigError, match="instant uptake"):
        gym.make("needbench/Menu-v0", need_overrides={}).unwrapped.core.finite_model()
    with pytest.raises(ConfigError, match="model"):
        gym.make("needbench/Forewarn-v0").unwrapped.core.finite_model()
    # Drift's model is the annual mean, not the step's outcome, even with fixed set points.
    fixed = {"energy": {"adaptation_rate": 0.0, "uptake_rate": float("inf")},
             "water": {"adaptation_rate": 0.0}}
    with pytest.raises(ConfigError, match="stationary"):
        gym.make("needbench/Drift-v0", need_overrides=fixed).unwrapped.core.finite_model()
    with pytest.raises(ConfigError, match="resolution"):
        gym.make("needbench/Menu-v0").unwrapped.core.finite_model(resolution=0)
