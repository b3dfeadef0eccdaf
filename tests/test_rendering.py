"""rgb_array frames: the bitmap font, labelled gauges, one colour per meaning, Forewarn's
picture, and the PNG writer."""

import string

import gymnasium as gym
import numpy as np
import pytest

import needbench.envs
from needbench.envs import rendering
from needbench.envs.tasks.forewarn import IDLE

PICTURED = ("needbench/Forage-v0", "needbench/ForageWide-v0", "needbench/Arena-v0",
            "needbench/Forewarn-v0")


def _frame(task_id, seed=0):
    env = gym.make(task_id, render_mode="rgb_array")
    env.reset(seed=seed)
    return env, env.unwrapped.core


def test_every_printable_character_has_its_own_glyph():
    printable = set(string.printable[:95])
    assert set(rendering.FONT) == printable
    bitmaps = {character: glyph.tobytes() for character, glyph in rendering.FONT.items()}
    assert len(set(bitmaps.values())) == len(bitmaps)  # no two characters look alike
    assert not rendering.FONT[" "].any() and all(
        glyph.any() for character, glyph in rendering.FONT.items() if character != " ")


def test_draw_text_writes_the_glyphs_and_clips_at_the_edges():
    picture = np.zeros((30, 40, 3), np.uint8)
    rendering.draw_text(picture, "Hi", 2, 3, np.array([9, 9, 9], np.uint8), scale=2)
    drawn = np.all(picture == 9, axis=2)
    glyph = np.repeat(np.repeat(rendering.FONT["H"], 2, axis=0), 2, axis=1)
    assert np.array_equal(drawn[2:2 + glyph.shape[0], 3:3 + glyph.shape[1]], glyph)
    assert drawn[:, 3 + rendering.CELL_WIDTH * 2:].any()  # the i
    rendering.draw_text(picture, "far away", 25, 30)  # runs off the picture: no error
    unknown = np.zeros((20, 20, 3), np.uint8)
    question = np.zeros((20, 20, 3), np.uint8)
    rendering.draw_text(unknown, "\u00b0", 0, 0)
    rendering.draw_text(question, "?", 0, 0)
    assert np.array_equal(unknown, question)


@pytest.mark.parametrize("task_id", needbench.envs.TASK_IDS)
def test_frames_are_readable_and_gauges_name_need_and_set_point(task_id):
    env, core = _frame(task_id)
    env.step(env.action_space.sample())
    image = env.render()
    assert image.dtype == np.uint8 and min(image.shape[:2]) >= rendering.MIN_SIDE
    width = image.shape[1]
    gauges = rendering.gauge_image(core, 0, width)
    assert gauges.shape == (rendering.GAUGE_ROW * core.physiology.num_needs, width, 3)
    # The gauges close the frame unless padding follows them.
    assert any(np.array_equal(image[top:top + gauges.shape[0]], gauges)
               for top in range(image.shape[0] - gauges.shape[0] + 1))
    for k, need in enumerate(core.physiology.needs):
        expected = np.zeros((rendering.GAUGE_ROW, width, 3), np.uint8)
        label = f"{need.name}: set point {core.body.set_point[0, k]:.3g} {need.unit}"
        rendering.draw_text(expected, label, 2, rendering.MARGIN + 20, np.array([1, 1, 1]))
        written = np.all(expected == 1, axis=2)
        row = gauges[k * rendering.GAUGE_ROW:(k + 1) * rendering.GAUGE_ROW]
        assert written.any() and np.all(row[written] == rendering.TEXT_COLOUR)
        swatch = row[5, rendering.MARGIN + 5]
        assert np.array_equal(swatch, rendering.need_colour(need.name, k))


def test_one_colour_per_meaning_across_tasks():
    colours = [rendering.AGENT_COLOUR, *rendering.NEED_COLOURS.values(),
               *rendering.OTHER_NEED_COLOURS, rendering.BAND_COLOUR]
    assert len({tuple(colour) for colour in colours}) == len(colours)
    for task_id in PICTURED:
        env, core = _frame(task_id)
        picture = core.world.image(core.state, 0)
        agent = np.all(picture == rendering.AGENT_COLOUR, axis=2)
        assert agent.sum() >= 9, task_id  # the agent, in the agent colour, in every picture


def test_forewarn_draws_horn_weather_and_oilskin():
    env, core = _frame("needbench/Forewarn-v0")
    world, state = core.world, core.state
    pictures = {}
    for phase, since in (("calm", IDLE), ("warned", 3), ("squall", world.warning_delay + 2)):
        for coat in (False, True):
            state["since_cue"][0], state["coat"][0] = since, coat
            assert world.weather(state, 0)[0] == phase
            pictures[phase, coat] = world.image(state, 0)
    oilskin = np.array([245, 205, 40])
    waves = np.array([250, 235, 140])
    for (phase, coat), picture in pictures.items():
        assert picture.shape == (256, 432, 3)
        assert np.all(picture == oilskin, axis=2).any() == coat
        assert np.all(picture == waves, axis=2).any() == (phase == "warned")
    sky = {phase: pictures[phase, False][10, 200].astype(int).sum()
           for phase in ("calm", "warned", "squall")}
    assert sky["calm"] > sky["warned"] > sky["squall"]  # the sky darkens towards the squall
    state["since_cue"][0] = 3
    assert "squall in 7 steps" in world.text(state, 0)


def test_png_bytes_decode_to_the_same_picture(tmp_path):
    image = pytest.importorskip("matplotlib.image")
    env, core = _frame("needbench/Forewarn-v0")
    picture = rendering.with_caption(env.render(), "step 1: action 3, reward +0.01")
    path = rendering.write_png(picture, tmp_path / "frame.png")
    # Source: the PNG specification (W3C, 2003), read back by matplotlib's own PNG reader.
    decoded = image.imread(path)
    assert decoded.shape == picture.shape
    assert np.array_equal(np.round(decoded * 255).astype(np.uint8), picture)
    with pytest.raises(ValueError, match="H, W, 3"):
        rendering.png_bytes(np.zeros((4, 4), np.uint8))
