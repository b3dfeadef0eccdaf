"""Episode metrics on traces worked by hand, and the drive-reduction return identity."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from needbench.benchmarks import metrics
from needbench.envs.errors import ConfigError


def _trace(level, set_point, band, drive, reward_internal, reward_task=None, *,
           terminated=False, disturbance=None):
    """An episode trace in the harness's format, from per-step lists."""
    level = np.asarray(level, dtype=float)
    steps = level.shape[0] - 1
    reward_internal = np.asarray(reward_internal, dtype=float)
    reward_task = np.zeros(steps) if reward_task is None else np.asarray(reward_task, float)
    trace = {
        "level": level,
        "set_point": np.broadcast_to(np.asarray(set_point, float), level.shape).copy(),
        "band": np.asarray(band, dtype=float),
        "drive": np.asarray(drive, dtype=float),
        "reward": reward_internal + reward_task,
        "reward_internal": reward_internal,
        "reward_task": reward_task,
        "alive": np.full(steps, not terminated),
        "action": np.zeros(steps, dtype=np.int64),
        "intake": np.zeros_like(level[1:]),
        "terminated": np.array(terminated),
        "truncated": np.array(not terminated),
    }
    if disturbance is not None:
        trace["disturbance"] = np.asarray(disturbance, dtype=bool)
    return trace


# Two needs, energy (set point 10, band 2) and water (set point 5, band 1), for
# T = 3 steps. Deviations (h - h*) / band:
#   h_0 = (10, 5)   -> ( 0,    0  )  norm 0
#   h_1 = (12, 5)   -> ( 1,    0  )  norm 1              in band (|2| <= 2, the edge)
#   h_2 = (16, 4)   -> ( 3,   -1  )  norm sqrt(10)       out (energy 6 > 2)
#   h_3 = ( 9, 5.5) -> (-0.5,  0.5)  norm sqrt(0.5)      in band
# Drive: sum of squared band deviations, D = (0, 1, 10, 0.5).
# Drive-reduction reward D_t - D_{t+1} = (-1, -9, 9.5); task reward (0, 1, 0).
HAND = _trace(level=[[10, 5], [12, 5], [16, 4], [9, 5.5]], set_point=[10, 5], band=[2, 1],
              drive=[0.0, 1.0, 10.0, 0.5], reward_internal=[-1.0, -9.0, 9.5],
              reward_task=[0.0, 1.0, 0.0], disturbance=[False, True, True])
GAMMA = 0.5


def test_returns_by_hand():
    # Source: hand computation on the trace above.
    # total reward (-1, -8, 9.5): sum = 0.5
    assert metrics.episode_return(HAND) == pytest.approx(0.5)
    # task reward (0, 1, 0): sum = 1
    assert metrics.extrinsic_return(HAND) == pytest.approx(1.0)
    # -1 + 0.5 * (-8) + 0.25 * 9.5 = -1 - 4 + 2.375 = -2.625
    assert metrics.discounted_return(HAND, GAMMA) == pytest.approx(-2.625)
    assert metrics.episode_length(HAND) == 3


def test_drive_and_deviation_by_hand():
    # Source: hand computation on the trace above.
    # discounted drive: 0 + 0.5 * 1 + 0.25 * 10 = 3 (h_3 not counted)
    assert metrics.discounted_drive(HAND, GAMMA) == pytest.approx(3.0)
    # normalised: (1 - 0.5) / (1 - 0.5^3) = 0.5 / 0.875 = 4/7, times 3 = 12/7
    assert metrics.normalised_discounted_drive(HAND, GAMMA) == pytest.approx(12 / 7)
    # discounted deviation: 0 + 0.5 * 1 + 0.25 * sqrt(10)
    assert metrics.discounted_deviation(HAND, GAMMA) == pytest.approx(0.5 + 0.25 * math.sqrt(10))
    assert metrics.normalised_discounted_deviation(HAND, GAMMA) == pytest.approx(
        4 / 7 * (0.5 + 0.25 * math.sqrt(10)))
    # per-need mean |deviation| over t = 1..3: energy (1 + 3 + 0.5) / 3 = 1.5,
    # water (0 + 1 + 0.5) / 3 = 0.5
    np.testing.assert_allclose(metrics.mean_absolute_deviation(HAND), [1.5, 0.5])
    # in band at t = 1 and t = 3, out at t = 2: 2/3
    assert metrics.time_in_band(HAND) == pytest.approx(2 / 3)
    # excess above set point, summed over needs: t1 1 + 0, t2 3 + 0, t3 0 + 0.5;
    # (1 + 3 + 0.5) / 3 = 1.5
    assert metrics.overconsumption(HAND) == pytest.approx(1.5)


def test_gamma_one_is_the_plain_mean():
    # Source: hand computation: (0 + 1 + 10) / 3 = 11/3.
    assert metrics.normalised_discounted_drive(HAND, 1.0) == pytest.approx(11 / 3)
    assert metrics.discounted_drive(HAND, 1.0) == pytest.approx(11.0)


def test_survival():
    assert metrics.survived(HAND) is True
    dead = _trace(level=[[10, 5], [0, 5]], set_point=[10, 5], band=[2, 1], drive=[0.0, 25.0],
                  reward_internal=[-25.0], terminated=True)
    assert metrics.survived(dead) is False
    # Source: hand computation. Alive after steps 1 and 3 of 3, dead after step 2
    # (a task that penalises rather than terminates): 2/3 of the time alive.
    penalised = {**HAND, "alive": np.array([True, False, True])}
    assert metrics.time_alive(penalised) == pytest.approx(2 / 3)
    assert metrics.survived(penalised) is True


def test_anticipation_by_hand():
    # Source: hand computation. disturbance marks steps 1 and 2, i.e. the states
    # h_2 and h_3: mean norm (sqrt(10) + sqrt(0.5)) / 2.
    inside = (math.sqrt(10) + math.sqrt(0.5)) / 2
    assert metrics.disturbance_deviation(HAND) == pytest.approx(inside)
    # Against a reactive baseline deviating twice as much: ratio 1/2.
    assert metrics.anticipation(HAND, 2 * inside) == pytest.approx(0.5)
    # Against itself, given as a trace: ratio 1.
    assert metrics.anticipation(HAND, HAND) == pytest.approx(1.0)
    with pytest.raises(ConfigError, match="baseline"):
        metrics.anticipation(HAND, 0.0)


def test_optimality_gap():
    # Common practice, no source: gap = optimum - value for a return (higher is
    # better), value - optimum for a cost.
    assert metrics.optimality_gap(7.0, 10.0) == pytest.approx(3.0)
    assert metrics.optimality_gap(12.0, 10.0, higher_is_better=False) == pytest.approx(2.0)
    assert metrics.optimality_gap(11.0, 10.0) == pytest.approx(-1.0)  # not clipped


def test_episode_metrics_and_summary():
    result = metrics.episode_metrics(HAND, GAMMA, need_names=["energy", "water"])
    assert result["discounted_drive"] == pytest.approx(3.0)
    assert result["deviation/energy"] == pytest.approx(1.5)
    assert result["deviation/water"] == pytest.approx(0.5)
    assert result["survived"] == 1.0 and result["length"] == 3.0
    assert result["time_alive"] == 1.0
    assert "extrinsic_return" in result and "disturbance_deviation" in result
    assert all(isinstance(value, float) for value in result.values())
    unnamed = metrics.episode_metrics(HAND, GAMMA)
    assert {"deviation/need_0", "deviation/need_1"} <= set(unnamed)
    with pytest.raises(ConfigError, match="need_names"):
        metrics.episode_metrics(HAND, GAMMA, need_names=["energy"])

    dead = _trace(level=[[10, 5], [0, 5]], set_point=[10, 5], band=[2, 1], drive=[0.0, 25.0],
                  reward_internal=[-25.0], terminated=True)
    other = metrics.episode_metrics(dead, GAMMA, need_names=["energy", "water"])
    summary = metrics.summarise([result, other])
    # Source: hand computation. One of two episodes survived; lengths 3 and 1.
    assert summary["survival"] == pytest.approx(0.5)
    assert summary["length"] == pytest.approx(2.0)
    assert summary["episodes"] == 2.0
    # only the first episode had a disturbance: its value alone
    assert summary["disturbance_deviation"] == pytest.approx(result["disturbance_deviation"])
    assert "survived" not in summary


def test_bad_traces_raise_config_error():
    with pytest.raises(ConfigError, match="drive"):
        metrics.discounted_drive({**HAND, "drive": np.zeros(3)}, GAMMA)
    with pytest.raises(ConfigError, match="level"):
        metrics.time_in_band({k: v for k, v in HAND.items() if k != "level"})
    with pytest.raises(ConfigError, match="gamma"):
        metrics.discounted_return(HAND, 1.5)
    with pytest.raises(ConfigError, match="band"):
        metrics.time_in_band({**HAND, "band": np.array([2.0, 0.0])})


# ----------------------------------------------------------------------------
# Keramati & Gutkin (2014): the discounted drive-reduction return telescopes
# ----------------------------------------------------------------------------

@settings(max_examples=200, deadline=None)
@given(drives=st.lists(st.floats(0.0, 1e3, allow_nan=False), min_size=2, max_size=60),
       gamma=st.floats(0.01, 1.0))
def test_drive_reduction_return_identity(drives, gamma):
    drive = np.asarray(drives)
    steps = drive.shape[0] - 1
    level = np.zeros((steps + 1, 1))
    trace = _trace(level=level, set_point=[0.0], band=[1.0], drive=drive,
                   reward_internal=drive[:-1] - drive[1:])
    # Source: Keramati & Gutkin (2014): for r_t = D_t - D_{t+1},
    #   sum_{t<T} gamma^t r_t = D_0 - ((1 - gamma) / gamma) sum_{t=1}^{T-1} gamma^t D_t
    #                           - gamma^(T-1) D_T.
    middle = sum(gamma**t * drives[t] for t in range(1, steps))
    expected = drives[0] - (1 - gamma) / gamma * middle - gamma ** (steps - 1) * drives[steps]
    scale = 1.0 + max(drives) * (1 + (1 - gamma) / gamma * steps)
    assert metrics.discounted_return(trace, gamma) == pytest.approx(expected, abs=1e-9 * scale)
    # The same identity read through the discounted-drive metric, whose sum runs
    # over t = 0..T-1: sum_{t=1}^{T-1} gamma^t D_t = discounted_drive - D_0.
    through_drive = (drives[0] - (1 - gamma) / gamma
                     * (metrics.discounted_drive(trace, gamma) - drives[0])
                     - gamma ** (steps - 1) * drives[steps])
    assert metrics.discounted_return(trace, gamma) == pytest.approx(through_drive,
                                                                    abs=1e-9 * scale)
