"""Lure: palatability and perceived outcomes in the reward, and the deviation a lure causes."""

import math

import gymnasium as gym
import numpy as np
import pytest

import needbench.envs  # noqa: F401  (registers the tasks)
from needbench.envs.errors import ConfigError
from needbench.envs.physiology import BodyState
from needbench.envs.tasks.lure import FAIR_STALLS, LureEnv, LureVectorEnv

BUN, WATER, FUDGE = 1, 2, 3

#: The fair with the fudge swapped for sugar floss: true energy 0.2, perceived 0.6.
FLOSS_FAIR = FAIR_STALLS[:3] + (("sugar floss", ((1.0, {"energy": 0.2}),)),)
FLOSS_LURE = {"sugar floss": {"energy": 0.4}}


def greedy_values(core):
    """(B, I) expected one-step reward of each item under the core's own reward channel.

    The agent knows the outcome model (true and perceived outcomes,
    palatability) and the body; each candidate is scored by the engine's RewardChannel.compute, so
    one agent serves every channel.
    """
    model = core.world.model()
    probabilities, effects = model["probabilities"], model["effects"]
    perceived = model["perceived_effects"]
    items, outcomes = probabilities.shape
    body = core.body
    batch, k = body.level.shape
    n = batch * items * outcomes

    def spread(array):
        return np.broadcast_to(array[:, None, None, :], (batch, items, outcomes, k)).reshape(n, k)

    def tile(array):
        return np.broadcast_to(array[None], (batch, items, outcomes, k)).reshape(n, k)

    before = BodyState(spread(body.level), spread(body.gut), spread(body.set_point))
    after = core.physiology.transition(before, None, intake=tile(effects), activity=np.zeros(n))
    palatability = np.broadcast_to(model["palatability"][None], (batch, items, outcomes))
    parts = core.reward_channel.compute(core.drive, before, after, intake=tile(effects),
                                        alive=np.ones(n, bool), task=np.zeros(n),
                                        perceived=tile(perceived),
                                        palatability=palatability.reshape(n))
    return np.sum(parts.total.reshape(batch, items, outcomes) * probabilities[None], axis=2)


def greedy_run(copies=16, seed=0, **kwargs):
    """Mean deviation (copies, K) over the last half of an episode, and item counts."""
    env = LureVectorEnv(num_envs=copies, **kwargs)
    env.reset(seed=seed)
    deviations, items = [], []
    for _ in range(env.core.max_steps):
        actions = np.argmax(greedy_values(env.core), axis=1)
        _, _, terminated, _, info = env.step(actions)
        assert not terminated.any()
        deviations.append(info["deviation"])
        items.append(actions)
    half = np.array(deviations)[len(deviations) // 2:]
    return half.mean(axis=0), np.bincount(np.concatenate(items), minlength=4)


UNDER = {"lure": "under_registered"}
HONEST = {"reward": "drive_reduction", "palatability_weight": 0.0}


def test_greedy_agent_overconsumes_the_palatable_fudge_and_more_so_with_more_palatability():
    excess = {}
    for t in (0.0, 0.25, 0.5, 1.0):
        deviation, items = greedy_run(palatability={"honey fudge": t})
        excess[t] = deviation[:, 0]
        if t > 0:
            assert items[FUDGE] > 0 and items[BUN] == 0
    default, _ = greedy_run()
    assert np.array_equal(default[:, 0], excess[0.5])
    # Measured: T = 0: -0.04 band (every copy below +0.01); 0.25: +0.11; 0.5: +0.23
    # (every copy +0.21..+0.27); 1.0: +0.56.
    assert np.all(excess[0.0] < 0.05)
    assert np.all(excess[0.5] > 0.15)
    # Source: for r = D(h) - D(h + k) + T a greedy agent eats the fudge while
    # T > D(h + k) - D(h) - (the best honest alternative), a threshold that
    # rises with T, so the level it holds rises with T.
    means = [excess[t].mean() for t in (0.0, 0.25, 0.5, 1.0)]
    assert means == sorted(means) and means[-1] - means[0] > 0.4


def test_greedy_agent_on_the_perceived_reward_stays_above_the_set_point():
    lured, lured_items = greedy_run(**UNDER)
    honest, honest_items = greedy_run(**UNDER, **HONEST)
    band = 1.0  # abstract preset: energy band 1, deviations are in band units
    # Measured: +0.28 band on the perceived reward (every copy +0.27..+0.29),
    # -0.02 band on honest drive reduction (every copy -0.04..+0.01).
    assert lured[:, 0].mean() > 0.2 * band
    assert np.all(lured[:, 0] > 0.15 * band)
    assert abs(honest[:, 0].mean()) < 0.1 * band
    assert np.all(np.abs(honest[:, 0]) < 0.1 * band)
    # The lured agent eats fudge; the honest one eats buns and never the fudge.
    assert lured_items[FUDGE] > 0 and lured_items[BUN] == 0
    assert honest_items[BUN] > 0 and honest_items[FUDGE] <= 1
    # Water is perceived honestly: both agents hold it near the set point.
    assert np.all(np.abs(lured[:, 1]) < 0.1) and np.all(np.abs(honest[:, 1]) < 0.1)


def test_an_item_perceived_as_more_nourishing_keeps_the_agent_hungry():
    lured, lured_items = greedy_run(items=FLOSS_FAIR, lures=FLOSS_LURE)
    honest, _ = greedy_run(items=FLOSS_FAIR, lures=FLOSS_LURE, **HONEST)
    # Source: for r = D(h) - D(h + k_hat) a greedy agent eats iff |h + k_hat| < |h|,
    # i.e. below -k_hat / 2 = -0.3; the floss then lifts energy by only 0.2, so the
    # level cycles below the set point (measured: -0.22 band vs 0.00 honest).
    assert np.all(lured[:, 0] < -0.15)
    assert np.all(np.abs(honest[:, 0]) < 0.1)
    assert lured_items[3] > 0


def drive_by_hand(level):
    # Source: Keramati & Gutkin (2014) drive, D(h) = (sum_i |h*_i - h_i|^3)^(1/2),
    # set points 0 and bands 1 in the abstract preset.
    return math.sqrt(sum(abs(x) ** 3 for x in level))


def test_reward_is_the_drive_reduction_of_the_perceived_outcome():
    env = LureEnv(**UNDER)
    _, info = env.reset(seed=4)
    for action in (FUDGE, BUN, WATER, 0, FUDGE):
        before = info["level"]
        _, reward, _, _, info = env.step(action)
        perceived = info["perceived_intake"]
        bias = np.array([-0.6, 0.0]) if action == FUDGE else np.zeros(2)
        assert np.allclose(perceived, info["intake"] + bias)
        assert info["lure"] == (action == FUDGE)
        expected = drive_by_hand(before) - drive_by_hand(before + perceived)
        assert reward == pytest.approx(expected, rel=1e-12, abs=1e-12)
        assert info["reward_internal"] == pytest.approx(expected, rel=1e-12, abs=1e-12)
        assert info["palatability"] == 0.0


def test_reward_adds_the_palatability_of_the_item_taken():
    env = LureEnv(palatability_weight=0.8)
    _, info = env.reset(seed=4)
    for action in (FUDGE, BUN, 0, FUDGE, WATER):
        before = info["level"]
        _, reward, _, _, info = env.step(action)
        palatability = 0.5 if action == FUDGE else 0.0
        assert info["palatability"] == palatability
        assert info["lure"] == (action == FUDGE)
        assert np.array_equal(info["perceived_intake"], info["intake"])
        # Source: Keramati & Gutkin (2014), r_t = D(h_t) - D(h_t + k_hat_t) + T_t,
        # here with the palatability term weighted by 0.8.
        expected = drive_by_hand(before) - drive_by_hand(before + info["intake"]) \
            + 0.8 * palatability
        assert reward == pytest.approx(expected, rel=1e-12, abs=1e-12)


def test_an_empty_outcome_pays_no_palatability():
    items = FAIR_STALLS[:3] + (("fair raffle", ((0.5, {"energy": 2.0}), (0.5, {}))),)
    model = LureEnv(items=items, palatability={"fair raffle": 0.3}).core.world.model()
    assert np.allclose(model["palatability"][3], [0.3, 0.0])
    assert np.allclose(model["palatability"][:3], 0.0)
    assert model["lure"].tolist() == [False, False, False, True]


def test_honest_perception_without_drain_equals_drive_reduction():
    # Source: the sensory-estimate channel's definition (needbench.envs.rewards):
    # with k_hat = k, instant uptake and no drain, h_{t+1} = h_t + k, so
    # D(h_t) - D(h_t + k_hat) = D(h_t) - D(h_{t+1}).
    still = {"energy": {"uptake_rate": math.inf, "drain": 0.0}, "water": {"drain": 0.0}}
    sensory = LureVectorEnv(num_envs=4, lures={}, need_overrides=still)
    honest = LureVectorEnv(num_envs=4, lures={}, need_overrides=still,
                           reward="drive_reduction")
    sensory.reset(seed=2)
    honest.reset(seed=2)
    actions = np.random.default_rng(0).integers(0, 4, size=(30, 4))
    for step_actions in actions:
        a = sensory.step(step_actions)
        b = honest.step(step_actions)
        assert np.allclose(a[1], b[1], atol=1e-12)


def test_model_reports_perceived_outcomes():
    world = LureEnv(lures={"rye bun": {"energy": 0.3, "water": 0.1}}, palatability={}).core.world
    model = world.model()
    assert model["lure"].tolist() == [False, True, False, False]
    expected = model["effects"].copy()
    expected[BUN, 0] += [0.3, 0.1]
    assert np.allclose(model["perceived_effects"], expected)
    # An empty outcome of a lure lottery is perceived as empty.
    items = FAIR_STALLS[:3] + (("fair raffle", ((0.5, {"energy": 2.0}), (0.5, {}))),)
    model = LureEnv(items=items, lures={"fair raffle": {"energy": 1.0}}).core.world.model()
    assert np.allclose(model["perceived_effects"][3], [[3.0, 0.0], [0.0, 0.0]])


@pytest.mark.parametrize(("lures", "field"), [
    ({"cotton candy": {"energy": 0.5}}, "lures"),
    ({"honey fudge": {"salt": 0.5}}, "need"),
    ({"honey fudge": {"energy": float("inf")}}, "lures.honey fudge.energy"),
    ({"honey fudge": 0.5}, "lures.honey fudge"),
    ([("honey fudge", 0.5)], "lures"),
])
def test_bad_lures_name_the_field(lures, field):
    with pytest.raises(ConfigError) as caught:
        gym.make("needbench/Lure-v1", lures=lures)
    assert caught.value.path == field


@pytest.mark.parametrize(("keywords", "field"), [
    ({"palatability": {"cotton candy": 0.5}}, "palatability"),
    ({"palatability": {"honey fudge": float("nan")}}, "palatability.honey fudge"),
    ({"palatability": 0.5}, "palatability"),
    ({"lure": "sticky"}, "lure"),
    ({"palatability_weight": float("inf")}, "reward.palatability_weight"),
])
def test_bad_palatability_names_the_field(keywords, field):
    with pytest.raises(ConfigError) as caught:
        gym.make("needbench/Lure-v1", **keywords)
    assert caught.value.path == field


def test_registered_defaults():
    env = gym.make("needbench/Lure-v1")
    core = env.unwrapped.core
    assert core.reward_channel.kind == "sensory_estimate"
    assert core.reward_channel.palatability_weight == 1.0
    model = core.world.model()
    assert model["palatability"][FUDGE, 0] == 0.5 and np.all(model["perceived_effects"]
                                                              == model["effects"])
    under = gym.make("needbench/Lure-v1", **UNDER).unwrapped.core.world.model()
    assert np.all(under["palatability"] == 0.0)
    assert under["perceived_effects"][FUDGE, 0, 0] == pytest.approx(0.4)
    assert math.isinf(core.physiology.uptake_rate[0])
    assert core.max_steps == 200
