"""Arena: motion, activity cost, source intake and warmth, sensing, and a reactive controller."""

import math

import gymnasium as gym
import numpy as np
import pytest
from scipy.spatial.distance import cdist

import needbench.envs  # noqa: F401  (registers the tasks)
from needbench.envs import rendering
from needbench.envs.errors import ConfigError
from needbench.envs.tasks.arena import ISLAND_SOURCES, ArenaEnv, ArenaVectorEnv


def place(env, position, sources=None):
    """Put copy 0's agent (and optionally every source) at given island points."""
    core = env.unwrapped.core
    core.state["position"][0] = position
    if sources is not None:
        core.state["sources"][0] = sources


def far_corner_sources(env):
    """Every source in the north-east corner, so the south-west is empty ground."""
    core = env.unwrapped.core
    radius = core.world.source_radius
    return np.stack([1.0 - radius, 1.0 - radius], axis=1)


def test_constant_velocity_moves_in_a_straight_line_and_stops_at_the_shore():
    env = ArenaEnv(needs=("energy", "water"))
    env.reset(seed=0)
    place(env, (0.2, 0.3), far_corner_sources(env))
    action = np.array([0.6, -0.8], np.float32)
    for t in range(1, 4):
        _, _, _, _, info = env.step(action)
        # Source: kinematics of uniform motion, x_t = x_0 + v t (v = max_speed * action).
        assert np.allclose(info["position"], [0.2 + 0.05 * 0.6 * t, 0.3 - 0.05 * 0.8 * t],
                           atol=1e-6)
        assert info["speed"] == pytest.approx(1.0, abs=1e-6)
    # A diagonal (1, 1) is cut to length 1 with its heading kept.
    place(env, (0.5, 0.5))
    _, _, _, _, info = env.step(np.array([1.0, 1.0], np.float32))
    # Source: the unit vector along (1, 1) is (1/sqrt 2, 1/sqrt 2) (Euclidean geometry).
    assert np.allclose(info["position"], 0.5 + 0.05 / math.sqrt(2.0), atol=1e-9)
    place(env, (0.01, 0.5))
    for _ in range(3):
        _, _, _, _, info = env.step(np.array([-1.0, 0.0], np.float32))
    assert info["position"][0] == 0.0 and info["position"][1] == pytest.approx(0.5)


def test_energy_cost_is_proportional_to_speed():
    # Energy has no relaxation (k = 0) and, without temperature, no coupling, so one
    # step away from every source changes it by -(drain + activity_cost * speed).
    changes = {}
    for speed in (0.0, 0.25, 0.5, 1.0):
        env = ArenaEnv(needs=("energy", "water"))
        _, info0 = env.reset(seed=3)
        place(env, (0.1, 0.1), far_corner_sources(env))
        _, _, _, _, info = env.step(np.array([speed, 0.0], np.float32))
        changes[speed] = info["level"][0] - info0["level"][0]
    for speed, change in changes.items():
        # Source: exact solution of dh/dt = -(drain + c * speed), h_1 = h_0 - (drain + c s) dt.
        assert change == pytest.approx(-(0.02 + 0.02 * speed), abs=1e-12)
    assert changes[1.0] - changes[0.0] == pytest.approx(2 * (changes[0.5] - changes[0.0]))


@pytest.mark.parametrize("fraction", [0.0, 0.25, 0.5, 1.0, 1.5])
def test_drinking_rate_falls_linearly_to_the_rim(fraction):
    env = ArenaEnv(needs=("energy", "water"))
    _, info0 = env.reset(seed=1)
    core = env.unwrapped.core
    pools = np.flatnonzero(core.world.source_need == core.physiology.index["water"])
    sources = far_corner_sources(env)
    radius = core.world.source_radius[pools[0]]
    sources[pools[0]] = (0.3, 0.3)
    place(env, (0.3 + fraction * radius, 0.3), sources)
    _, _, _, _, info = env.step(np.zeros(2, np.float32))
    rate = ISLAND_SOURCES["water"]["rate"]
    expected = rate * max(0.0, 1.0 - fraction)
    # Source: the documented linear fall-off 1 - d/r; water is delivered at once, so
    # the level moves by intake - drain exactly (k = 0).
    assert info["intake"][1] == pytest.approx(expected, abs=1e-12)
    assert info["level"][1] - info0["level"][1] == pytest.approx(expected - 0.03, abs=1e-12)
    assert info["intake"][0] == 0.0


def test_warm_boulders_heat_the_body_by_newtons_law():
    overrides = {"temperature": {"initial_low": 0.1, "initial_high": 0.4}}
    env = ArenaEnv(need_overrides=overrides)
    _, info0 = env.reset(seed=2)
    core = env.unwrapped.core
    rock = np.flatnonzero(core.world.source_need == core.physiology.index["temperature"])[0]
    sources = far_corner_sources(env)
    sources[rock] = (0.4, 0.4)
    place(env, (0.4, 0.4), sources)
    h0 = info0["level"][2]
    peak = ISLAND_SOURCES["temperature"]["peak"]
    for t in range(1, 41):
        _, _, _, _, info = env.step(np.zeros(2, np.float32))
        # Source: Newton's law of cooling, h(t) = a + (h0 - a) exp(-k t), with a the
        # boulders' peak ambient and k = 0.05 (above the set point no shivering term).
        expected = peak + (h0 - peak) * math.exp(-0.05 * t)
        assert info["level"][2] == pytest.approx(expected, abs=1e-9)


def test_sources_match_the_observed_vectors_and_the_sensing_cap():
    env = ArenaEnv()
    obs, _ = env.reset(seed=4)
    core = env.unwrapped.core
    sources = core.world.sources(core.state)
    assert {n: s.shape for n, s in sources.items()} == {
        "energy": (1, 2, 2), "water": (1, 2, 2), "temperature": (1, 1, 2)}
    centres = np.concatenate([sources[n][0] for n in core.need_names])
    position = obs[3:5]
    vectors = obs[5:].reshape(-1, 2)
    # Source: the documented feature, (centre - position) / sensing_range (1.5 > sqrt 2).
    assert np.allclose(vectors, (centres - position) / 1.5, atol=1e-6)

    near = ArenaEnv(sensing_range=0.05)
    obs, _ = near.reset(seed=4)
    capped = obs[5:].reshape(-1, 2)
    direction = centres - position
    lengths = np.linalg.norm(capped, axis=1)
    assert np.all(lengths <= 1.0 + 1e-6)
    far = np.linalg.norm(direction, axis=1) > 0.05
    assert np.allclose(lengths[far], 1.0, atol=1e-6)
    # Capping keeps the heading: cosine similarity 1 (Euclidean geometry).
    cosine = np.sum(capped * direction, axis=1) / (lengths * np.linalg.norm(direction, axis=1))
    assert np.allclose(cosine, 1.0, atol=1e-6)


def head_for_the_most_urgent_source(core, obs, threshold=-0.3):
    """Reactive controller: go to the nearest source of the need furthest below its
    set point; leave a source of a need that is already above its set point."""
    world, position = core.world, core.state["position"]
    deviation = obs[:, :core.physiology.num_needs]
    batch = obs.shape[0]
    rows = np.arange(batch)
    urgent = np.argmin(deviation, axis=1)
    going = deviation[rows, urgent] < threshold
    actions = np.zeros((batch, 2))
    for k, (need, centres) in enumerate(world.sources(core.state).items()):
        assert core.need_names[k] == need
        offset = centres - position[:, None]
        distance = np.linalg.norm(offset, axis=2)
        nearest = np.argmin(distance, axis=1)
        vector, gap = offset[rows, nearest], distance[rows, nearest][:, None]
        heading = vector / np.maximum(gap, 1e-9)
        toward = heading * np.minimum(1.0, gap / 0.05)
        chosen = going & (urgent == k)
        actions[chosen] = toward[chosen]
        radius = world.source_radius[world.source_need == k][nearest]
        sated = (gap[:, 0] < radius) & (deviation[:, k] > 0) & ~chosen
        actions[sated] = -heading[sated]
    return actions.astype(np.float32)


def run(policy, seed=0, copies=16, steps=300):
    env = ArenaVectorEnv(num_envs=copies, max_steps=steps)
    obs, _ = env.reset(seed=seed)
    rng = np.random.default_rng(seed)
    ended = np.zeros(copies, bool)
    drives, survived = [], np.zeros(copies)
    for _ in range(steps):
        actions = (policy(env.core, obs) if policy is not None
                   else rng.uniform(-1, 1, (copies, 2)).astype(np.float32))
        obs, _, terminated, truncated, info = env.step(actions)
        drives.append(np.where(ended, np.nan, info["drive"]))
        ended |= terminated
        survived += ~ended
    return float(np.nanmean(drives)), float(survived.mean())


def test_reactive_controller_beats_random_wandering():
    # Common practice, no source: a controller using the source positions must keep
    # the body far closer to its set points than random motion does.
    reactive_drive, reactive_survival = run(head_for_the_most_urgent_source)
    random_drive, random_survival = run(None)
    # Measured (seed 0): reactive 1.25 mean drive, all 300 steps; random 7.3 and 144 steps.
    assert reactive_survival >= 290 and random_survival < 200
    assert reactive_drive < 0.4 * random_drive


def test_image_shows_sources_and_agent():
    env = gym.make("needbench/Arena-v0", render_mode="rgb_array")
    env.reset(seed=0)
    core = env.unwrapped.core
    picture = core.world.image(core.state, 0)
    assert picture.shape == (256, 256, 3) and picture.dtype == np.uint8
    frame = env.render()
    assert min(frame.shape[:2]) >= rendering.MIN_SIDE
    # Ground, sources tinted in their needs' colours, and the agent in the agent colour.
    assert len(np.unique(picture.reshape(-1, 3), axis=0)) > 3
    assert np.any(np.all(picture == rendering.AGENT_COLOUR, axis=2))
    # The warm spot is drawn in the temperature colour, which no agent ever wears.
    offset = picture.astype(float) - rendering.NEED_COLOURS["temperature"]
    assert np.sqrt((offset ** 2).sum(axis=2)).min() < 30
    text = gym.make("needbench/Arena-v0", render_mode="ansi")
    text.reset(seed=0)
    frame = text.render()
    assert "@" in frame and "agent: (" in frame and "E energy" in frame


@pytest.mark.parametrize(("kwargs", "path"), [
    ({"sources": {"salt": {"kind": "intake", "count": 1, "radius": 0.1, "rate": 0.1}}},
     "sources"),
    ({"sources": {"water": {"kind": "spring", "count": 1, "radius": 0.1}}}, "sources.water.kind"),
    ({"sources": {"water": {"kind": "intake", "count": 0, "radius": 0.1, "rate": 0.1}}},
     "sources.water.count"),
    ({"sources": {"water": {"kind": "intake", "count": 1, "radius": 0.7, "rate": 0.1}}},
     "sources.water.radius"),
    ({"sources": {"water": {"kind": "intake", "count": 1, "radius": 0.1, "rate": -1.0}}},
     "sources.water.rate"),
    ({"sources": {"water": {"kind": "intake", "count": 1, "radius": 0.1, "peak": 1.0}}},
     "sources.water"),
    ({"sources": {"water": {"kind": "ambient", "count": 1, "radius": 0.1, "peak": 1.0,
                            "outside": 0.0}}}, "sources.water.kind"),
    ({"max_speed": 0.0}, "max_speed"),
    ({"sensing_range": -1.0}, "sensing_range"),
])
def test_bad_parameters_name_the_field(kwargs, path):
    with pytest.raises(ConfigError) as error:
        ArenaEnv(**kwargs)
    assert error.value.path == path


def test_default_sources_follow_the_chosen_needs():
    env = ArenaEnv(needs=("water",))
    obs, _ = env.reset(seed=0)
    assert set(env.unwrapped.core.world.sources(env.unwrapped.core.state)) == {"water"}
    assert obs.shape == (1 + 2 + 2 * ISLAND_SOURCES["water"]["count"],)


def test_position_and_richness_are_what_the_step_used():
    env = ArenaVectorEnv(num_envs=4)
    env.reset(seed=6)
    core, world = env.core, env.core.world
    rng = np.random.default_rng(6)
    for _ in range(5):
        _, _, _, _, info = env.step(rng.uniform(-1, 1, (4, 2)).astype(np.float32))
        position = world.position(core.state)
        assert position.shape == (4, 2)
        assert np.array_equal(position, info["position"])
    # A copy: writing into it leaves the world's state alone.
    position[:] = -1.0
    assert np.all(world.position(core.state) >= 0.0)
    richness = world.richness(world.position(core.state), core.state["sources"])
    # Source: scipy.spatial.distance.cdist (Euclidean distance) for d in 1 - d/r.
    distance = np.stack([cdist(world.position(core.state)[b:b + 1], core.state["sources"][b])[0]
                         for b in range(4)])
    assert np.allclose(richness, np.clip(1.0 - distance / world.source_radius, 0.0, 1.0),
                       atol=1e-12)
    # The intake of a need is its richest source's strength times the rate (band 1).
    water = world.source_need == core.physiology.index["water"]
    assert np.allclose(info["intake"][:, core.physiology.index["water"]],
                       richness[:, water].max(axis=1) * ISLAND_SOURCES["water"]["rate"],
                       atol=1e-12)


def test_richness_takes_one_source_layout_for_many_points():
    env = ArenaEnv(needs=("water",))
    env.reset(seed=0)
    world = env.unwrapped.core.world
    centres = np.array([[0.5, 0.5], [0.2, 0.8]])
    points = np.array([[0.5, 0.5], [0.5 + 0.04, 0.5], [0.9, 0.9]])
    richness = world.richness(points, centres)
    # Source: the documented linear fall-off 1 - d/r (r = 0.08): centre 1, half-way 0.5.
    assert richness.shape == (3, 2)
    assert richness[:, 0] == pytest.approx([1.0, 0.5, 0.0], abs=1e-12)
    assert np.all(richness[:, 1] == 0.0)
