"""Reward channels, and the discounted-return identity of drive reduction."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from needbench.envs.drives import AsymmetricDrive, HomeostaticDrive, QuadraticDrive
from needbench.envs.errors import ConfigError
from needbench.envs.physiology import BodyState
from needbench.envs.rewards import RewardChannel

DRIVES = {
    "homeostatic": HomeostaticDrive(n=3, m=2),
    "quadratic": QuadraticDrive(weights=[1.0, 0.5, 2.0]),
    "asymmetric": AsymmetricDrive(weight_below=2.0, weight_above=0.5, n_below=3, n_above=1.5,
                                  m=1.2),
}


def body(level):
    level = np.atleast_2d(np.asarray(level, float))
    return BodyState(level, np.zeros_like(level), np.zeros_like(level))


@pytest.mark.parametrize("family", sorted(DRIVES))
@settings(max_examples=40, deadline=None)
@given(trajectory=arrays(np.float64, st.tuples(st.integers(2, 30), st.just(3)),
                         elements=st.floats(-5, 5)),
       gamma=st.floats(0.05, 0.999))
def test_discounted_return_identity(family, trajectory, gamma):
    # Source: Keramati & Gutkin (2014): with r_t = D(h_t) - D(h_{t+1}),
    # sum_{t<T} g^t r_t = D(h_0) - ((1-g)/g) sum_{t=1}^{T-1} g^t D(h_t) - g^(T-1) D(h_T),
    # so maximising reward is minimising discounted drive.
    drive = DRIVES[family]
    channel = RewardChannel("drive_reduction")
    T = trajectory.shape[0] - 1
    rewards = np.array([channel.compute(drive, body(trajectory[t]), body(trajectory[t + 1]))
                        .total[0] for t in range(T)])
    d = drive(trajectory, np.zeros(3))
    discounted = np.sum(gamma ** np.arange(T) * rewards)
    inner = np.sum(gamma ** np.arange(1, T) * d[1:T])
    identity = d[0] - (1 - gamma) / gamma * inner - gamma ** (T - 1) * d[T]
    assert discounted == pytest.approx(identity, rel=1e-9, abs=1e-9)


def test_channels_by_hand():
    drive = QuadraticDrive()
    before, after = body([-2.0, 0.0]), body([-1.0, 0.0])  # D: 4 -> 1
    assert RewardChannel("drive_reduction").compute(drive, before, after).total[0] == 3.0
    assert RewardChannel("negative_drive").compute(drive, before, after).total[0] == -1.0
    alive = np.array([True])
    assert RewardChannel("survival").compute(drive, before, after, alive=alive).total[0] == 1.0
    mixed = RewardChannel("drive_reduction", drive_weight=0.5, task_weight=2.0)
    parts = mixed.compute(drive, before, after, task=np.array([1.5]))
    assert parts.total[0] == pytest.approx(0.5 * 3.0 + 2.0 * 1.5)
    assert parts.internal[0] == 3.0 and parts.task[0] == 1.5


def test_sensory_estimate_sees_biased_outcome():
    drive = QuadraticDrive()
    before = body([-2.0, 0.0])
    intake = np.array([[1.0, 0.0]])
    after = body([-1.0, 0.0])  # the body changes by the true k = 1
    honest = RewardChannel("sensory_estimate").compute(drive, before, after, intake=intake)
    assert honest.total[0] == pytest.approx(3.0)  # same as drive reduction without bias
    lured = RewardChannel("sensory_estimate", bias=[1.0, 0.0]).compute(
        drive, before, after, intake=intake)
    # Perceived k_hat = 2 reaches the set point: D goes 4 -> 0 in the agent's eyes.
    assert lured.total[0] == pytest.approx(4.0)
    assert lured.drive_after[0] == pytest.approx(1.0)  # the body's true drive


def test_palatability_is_added_to_every_channel_with_its_weight():
    drive = QuadraticDrive()
    before, after = body([-2.0, 0.0]), body([-1.0, 0.0])
    intake = np.array([[1.0, 0.0]])
    palatability = np.array([0.7])
    # Source: Keramati & Gutkin (2014), r_t = D(h_t) - D(h_t + k_hat_t) + T_t: with the
    # quadratic drive D goes 4 -> 1, so r = 3 + 0.7.
    sensory = RewardChannel("sensory_estimate").compute(drive, before, after, intake=intake,
                                                        palatability=palatability)
    assert sensory.total[0] == pytest.approx(3.7) and sensory.internal[0] == pytest.approx(3.7)
    halved = RewardChannel("drive_reduction", drive_weight=2.0, palatability_weight=0.5)
    assert halved.compute(drive, before, after, palatability=palatability).total[0] == \
        pytest.approx(2.0 * (3.0 + 0.35))
    off = RewardChannel("sensory_estimate", palatability_weight=0.0)
    assert off.compute(drive, before, after, intake=intake,
                       palatability=palatability).total[0] == 3.0
    # The whole outcome assembly pays it too.
    from needbench.envs.presets import preset

    physiology = preset("abstract").physiology(["energy", "water"])
    outcome = RewardChannel().outcome(physiology, drive, before, after, palatability=palatability)
    assert outcome.reward[0] == pytest.approx(3.7)


def test_invalid_channel():
    with pytest.raises(ConfigError, match="reward.kind"):
        RewardChannel("pleasure")
    with pytest.raises(ConfigError, match="reward.task_weight"):
        RewardChannel(task_weight=float("nan"))
    with pytest.raises(ConfigError, match="reward.bias"):
        RewardChannel(bias=[0.0, float("inf")])
