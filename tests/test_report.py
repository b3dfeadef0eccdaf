"""The report, the comparison and the drive figure, from a real small run.

A tiny suite (Menu with the planner, Arena for a path on the map, Forewarn for
its events; random, the set-point controller, the planner and a short
tabular-q) runs once for the module; the report of its store is checked file
by file, in a parsed HTML page, and in headless Chromium.
"""

from __future__ import annotations

import base64
import json
import os
import shutil
import struct
import tempfile
from html.parser import HTMLParser
from pathlib import Path

import matplotlib.image
import numpy as np
import pytest
from scipy import stats

from needbench.benchmarks import figures
from needbench.benchmarks.cli import main
from needbench.benchmarks.compare import compare
from needbench.benchmarks.report import (
    CURVE_NAMES,
    binned_curves,
    build_report,
    curve_points,
    estimate,
    estimate_text,
    task_results,
    task_table,
)
from needbench.benchmarks.runner import run_suite
from needbench.benchmarks.spec import parse_suite
from needbench.benchmarks.store import JobResult, Store

HOSTILE_NAME = 'lab <script>alert("x")</script> & co'

SUITE = f"""
[suite]
name = '{HOSTILE_NAME}'
seeds = [0, 1, 2]
eval_episodes = 2

[[task]]
id = "needbench/Menu-v0"
[task.kwargs]
max_steps = 40

[[task]]
id = "needbench/Arena-v0"
[task.kwargs]
max_steps = 40

[[task]]
id = "needbench/Forewarn-v0"
[task.kwargs]
max_steps = 60

[[agent]]
name = "random"
total_steps = 0

[[agent]]
name = "setpoint-controller"
total_steps = 0

[[agent]]
name = "exact-planner"
total_steps = 0

[[agent]]
name = "tabular-q"
total_steps = 1200
[agent.hyperparameters]
internal_bins = 4
world_bins = 1
"""


@pytest.fixture(scope="module")
def run_folder(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("report-run")
    suite_file = folder / "suite.toml"
    suite_file.write_text(SUITE)
    suite = parse_suite(suite_file)
    with Store(folder / "results.sqlite3") as store:
        summary = run_suite(suite, store, workers=2)
    assert summary.ok and summary.done
    return folder


@pytest.fixture(scope="module")
def html_report(run_folder):
    with Store(run_folder / "results.sqlite3") as store:
        return build_report(store, run_folder / "report.html")


class _Page(HTMLParser):
    """The tags of interest of a page: images, section ids, scripts and outside links."""

    def __init__(self):
        super().__init__()
        self.images: list[dict[str, str]] = []
        self.sections: list[str] = []
        self.tags: list[str] = []
        self.links: list[str] = []

    def handle_starttag(self, tag, attrs):
        attributes = dict(attrs)
        self.tags.append(tag)
        if tag == "img":
            self.images.append(attributes)
        if tag == "section":
            self.sections.append(attributes.get("id", ""))
        for key in ("href", "src"):
            if key in attributes:
                self.links.append(attributes[key])


def _png_size(data: bytes) -> tuple[int, int]:
    # Source: the PNG specification (W3C, 2003), sections 5.2 and 11.2.2: an 8-byte
    # signature, then the IHDR chunk whose first two fields are width and height.
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    assert data[12:16] == b"IHDR"
    return struct.unpack(">II", data[16:24])


def test_every_figure_file_is_a_png_of_the_stated_size(html_report):
    kinds = {figure.path.name.rsplit("-", 1)[-1] for figure in html_report.figures}
    assert {"traces.png", "path.png", "tradeoff.png", "learning.png", "deviation.png"} <= kinds
    assert any(figure.path.name.startswith("drive-") for figure in html_report.figures)
    for figure in html_report.figures:
        data = figure.path.read_bytes()
        assert _png_size(data) == figures.FIGURE_PIXELS
        pixels = matplotlib.image.imread(figure.path)  # decodes every row
        assert pixels.shape[:2] == (figures.FIGURE_PIXELS[1], figures.FIGURE_PIXELS[0])
        assert pixels.std() > 0.01  # not a blank canvas


def test_html_has_every_section_and_embeds_every_image(html_report):
    text = html_report.path.read_text(encoding="utf-8")
    page = _Page()
    page.feed(text)
    assert page.sections == ["run", "task-Arena-v0", "task-Forewarn-v0", "task-Menu-v0", "drive"]
    assert len(page.images) == len(html_report.figures)
    for image, figure in zip(page.images, html_report.figures, strict=True):
        prefix = "data:image/png;base64,"
        assert image["src"].startswith(prefix)
        assert base64.b64decode(image["src"][len(prefix):]) == figure.path.read_bytes()
        assert image["alt"]
    # Self-contained: no script, no stylesheet or image from anywhere else.
    assert "script" not in page.tags
    assert all(link.startswith(("data:", "#")) for link in page.links)
    for heading in ("git revision of the runs", "packages of the report", "machine of the report",
                    "optimality gap of the return vs exact-planner", "deviation of energy",
                    "time in band"):
        assert heading in text


def test_names_from_the_suite_file_are_escaped(html_report):
    text = html_report.path.read_text(encoding="utf-8")
    assert "<script>" not in text
    assert "&lt;script&gt;alert(&quot;x&quot;)&lt;/script&gt; &amp; co" in text


def test_markdown_report_links_its_figures(run_folder):
    with Store(run_folder / "results.sqlite3") as store:
        report = build_report(store, run_folder / "summary.md", format="md")
    text = report.path.read_text(encoding="utf-8")
    assert "<script>" not in text
    assert "## needbench/Menu-v0" in text and "| metric |" in text
    for figure in report.figures:
        relative = figure.path.relative_to(run_folder).as_posix()
        assert f"]({relative})" in text
        assert figure.path.is_file()


def test_table_cells_are_interquartile_means_of_the_runs(run_folder):
    with Store(run_folder / "results.sqlite3") as store:
        tasks = {task.name: task for task in task_results(store)}
    menu = tasks["Menu-v0"]
    columns, rows = task_table(menu)
    assert columns == ["exact-planner", "random", "setpoint-controller", "tabular-q"]
    cells = dict(rows)["return (reward units)"]
    for series, cell in zip(menu.series, cells, strict=True):
        values = series.values("return")
        assert len(values) == 3
        # Source: scipy.stats.trim_mean with proportiontocut 0.25 is the interquartile mean.
        expected = stats.trim_mean(values, 0.25)
        assert cell.startswith(f"{expected:.3g} [")


def test_fewer_than_three_runs_show_no_interval():
    two = estimate([1.0, 3.0])
    assert two.low is None and two.high is None and two.value == pytest.approx(2.0)
    assert estimate_text(two) == "2 (n=2)"
    three = estimate([1.0, 2.0, 4.0])
    assert three.low is not None and three.low <= three.value <= three.high
    assert estimate([float("nan")]) is None
    # A cost keeps its orientation: the interval still brackets the value.
    cost = estimate([5.0, 6.0, 9.0, 10.0], higher_is_better=False)
    assert cost.low <= cost.value <= cost.high


def test_traces_of_a_spatial_task_carry_the_position(run_folder):
    with Store(run_folder / "results.sqlite3") as store:
        run = store.runs(task_id="needbench/Arena-v0", agent="random")[0]
        trace = store.trace(run["hash"], 0)
    steps = trace["reward"].shape[0]
    assert trace["position"].shape == (steps, 2)
    assert np.all((trace["position"] >= 0) & (trace["position"] <= 1))


def test_events_are_marked_at_their_onsets():
    trace = {"reward": np.zeros(6), "intake": np.array([[0, 0], [1, 0], [0, 0], [0, 2], [0, 0],
                                                       [0, 0]], dtype=float),
             "cue": np.array([False, True, True, False, True, False]),
             "alive": np.ones(6, dtype=bool)}
    events = figures._event_steps(trace, 2)
    assert set(events) == {"intake", "cue"}
    # Step t's info belongs to the state after the step, t + 1.
    assert events["intake"].tolist() == [2, 4]
    assert events["cue"].tolist() == [2, 5]


def test_pareto_front_by_hand():
    # (return, deviation): higher return and lower deviation are better.
    points = [(0.0, 5.0), (1.0, 3.0), (2.0, 4.0), (0.5, 6.0), (2.0, 3.5)]
    # (0.5, 6) is beaten by (1, 3); (2, 4) by (2, 3.5); (0, 5) by (1, 3).
    assert figures.pareto_front(points) == [1, 4]


def test_binned_curves_by_hand():
    steps = np.array([0, 10, 20, 30, 40, 50, 60, 70, 80, 90, 100, 110])
    runs = [(steps, np.full(12, value)) for value in (1.0, 2.0, 3.0, 10.0)]
    grid, centre, low, high = binned_curves(runs, bins=4)
    assert grid.shape == (4,)
    # IQM of (1, 2, 3, 10): floor(0.25 * 4) = 1 dropped at each end, mean of 2 and 3.
    assert np.allclose(centre, 2.5)
    assert np.all(low <= centre) and np.all(centre <= high)
    assert binned_curves([(np.zeros(0, dtype=int), np.zeros(0))]) is None


def test_learning_curves_read_the_names_agents_log(tmp_path):
    from needbench.agents.curves import EPISODE_RETURN

    config = {"suite": "s", "task": {"id": "needbench/Menu-v0", "kwargs": {}},
              "agent": {"name": "random"}, "seed": 0}
    assert CURVE_NAMES["return"] == (EPISODE_RETURN,)
    with Store(tmp_path / "store.sqlite3") as store:
        store.record_job(JobResult(hash="a", config=config, status="done", started=0.0,
                                   finished=1.0, wall_seconds=1.0,
                                   curves=[(5, "other/return", 1.0), (5, EPISODE_RETURN, 2.0)]))
        assert curve_points(store, "a", "return")[1].tolist() == [2.0]
        assert curve_points(store, "a", "time_in_band")[0].size == 0


def test_compare_against_reference_statistics(run_folder):
    with Store(run_folder / "results.sqlite3") as store:
        comparison = compare(store, "tabular-q", "random", "time_in_band")
        tasks = {task.name: task for task in task_results(store)}
    rows = {row.task: row for row in comparison.rows}
    assert set(rows) == {"all 2 tasks", "Menu-v0", "Forewarn-v0"}
    for name in ("Menu-v0", "Forewarn-v0"):
        series = {s.agent: s.values("time_in_band") for s in tasks[name].series}
        x, y = series["tabular-q"], series["random"]
        # Source: scipy.stats.mannwhitneyu; U / (n m) is P(X > Y) with ties counted 1/2.
        u = stats.mannwhitneyu(x, y, alternative="two-sided").statistic
        assert rows[name].probability[0] == pytest.approx(u / (len(x) * len(y)))
        assert rows[name].difference[0] == pytest.approx(
            stats.trim_mean(x, 0.25) - stats.trim_mean(y, 0.25))
        low, high = rows[name].probability[1:]
        assert 0.0 <= low <= high <= 1.0


def test_compare_command_writes_table_json_and_figure(run_folder, capsys, tmp_path):
    code = main(["compare", str(run_folder), "--agents", "setpoint-controller", "random",
                 "--metric", "discounted_drive", "--out", str(tmp_path)])
    assert code == 0
    printed = capsys.readouterr().out
    # The controller now runs on Forewarn too: Menu, Arena and Forewarn.
    assert "P(setpoint-controller > random)" in printed and "all 3 tasks" in printed
    record = json.loads((tmp_path / "comparison.json").read_text())
    assert record["higher_is_better"] is False and len(record["rows"]) == 4
    assert _png_size((tmp_path / "comparison.png").read_bytes()) == figures.FIGURE_PIXELS
    assert main(["compare", str(run_folder), "--agents", "random", "nobody"]) == 2


def test_compare_against_a_reference_store(run_folder, tmp_path):
    # The same store as its own reference gives the same comparison as within it.
    with Store(run_folder / "results.sqlite3") as store, \
            Store(run_folder / "results.sqlite3") as reference:
        within = compare(store, "tabular-q", "random", "time_in_band")
        across = compare(store, "tabular-q", "random", "time_in_band", reference)
    assert [(r.task, r.probability, r.difference) for r in across.rows] == \
        [(r.task, r.probability, r.difference) for r in within.rows]
    # A reference evaluated under another protocol is refused.
    other = tmp_path / "other"
    other.mkdir()
    suite_file = other / "suite.toml"
    suite_file.write_text("""
[suite]
name = "other protocol"
seeds = [0, 1, 2]
eval_episodes = 3

[[task]]
id = "needbench/Menu-v0"
[task.kwargs]
max_steps = 40

[[agent]]
name = "random"
total_steps = 0
""")
    with Store(other / "results.sqlite3") as reference:
        run_suite(parse_suite(suite_file), reference, workers=1)
    assert main(["compare", str(run_folder), "--agents", "tabular-q", "random",
                 "--reference", str(other)]) == 2


def test_report_command_and_bad_input(run_folder, capsys):
    out = run_folder / "from-cli" / "page.html"
    assert main(["report", str(run_folder), "--out", str(out)]) == 0
    assert out.is_file() and (out.parent / "page-figures").is_dir()
    assert "report:" in capsys.readouterr().out
    assert main(["report", str(run_folder / "missing")]) == 2


def test_drive_command_draws_with_the_package_drive(tmp_path, monkeypatch):
    import needbench.envs

    calls = []
    real = needbench.envs.make_drive

    def recording(*args, **kwargs):
        calls.append(kwargs)
        return real(*args, **kwargs)

    monkeypatch.setattr(needbench.envs, "make_drive", recording)
    out = tmp_path / "drive.png"
    assert main(["drive", "--m", "3", "--n", "4", "--out", str(out)]) == 0
    assert calls and calls[0]["m"] == 3.0 and calls[0]["n"] == 4.0
    assert _png_size(out.read_bytes()) == figures.FIGURE_PIXELS
    assert main(["drive", "--needs", "energy", "salt", "--out", str(out)]) == 2


def test_drive_figure_shows_the_published_drive_values():
    # D(h) = (sum_i |h*_i - h_i|^n)^(1/m); at a deviation of (1, 1) with n = 4, m = 3
    # it is 2^(1/3). Source: the definition of the homeostatic drive (Keramati &
    # Gutkin 2014), worked by hand.
    from needbench.envs import make_drive

    drive = make_drive("homeostatic", n=4.0, m=3.0, scale=[1.0, 1.0], num_needs=2)
    seen = []

    def spy(level, set_point):
        values = drive(level, set_point)
        seen.append((np.asarray(level), np.asarray(values)))
        return values

    figures.drive_figure(spy, ["a", "b"], ["u", "u"], [0.0, 0.0], [1.0, 1.0], "test")
    level, values = seen[0]
    index = np.unravel_index(np.argmin(np.abs(level - 1.0).sum(axis=-1)), level.shape[:-1])
    assert np.allclose(level[index], [1.0, 1.0])
    assert values[index] == pytest.approx(2.0 ** (1.0 / 3.0))


# ----------------------------------------------------------------------------
# The page in a real browser
# ----------------------------------------------------------------------------

CHROMIUM_FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--no-first-run",
                  "--disable-background-networking", "--disable-component-update",
                  "--disable-sync", "--disable-quic")


def _browser_or_skip():
    """A headless Chromium driven by selenium; skipped only where CI does not require it."""
    chromium = shutil.which("chromium")
    driver_binary = shutil.which("chromedriver")
    try:
        from selenium import webdriver
        from selenium.webdriver.chrome.service import Service
    except ImportError:
        webdriver = None
    if webdriver is None or chromium is None or driver_binary is None:
        if os.environ.get("NEEDBENCH_REQUIRE_BROWSER"):
            pytest.fail("NEEDBENCH_REQUIRE_BROWSER is set but chromium, chromedriver or "
                        "selenium is missing")
        pytest.skip("chromium, chromedriver or selenium not installed (.ci/run installs them)")
    options = webdriver.ChromeOptions()
    options.binary_location = chromium
    for flag in CHROMIUM_FLAGS:
        options.add_argument(flag)
    options.add_argument(f"--user-data-dir={tempfile.mkdtemp(prefix='needbench-chromium-')}")
    options.add_argument("--window-size=1200,1600")
    options.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    return webdriver.Chrome(service=Service(driver_binary), options=options)


def test_page_in_headless_chromium(html_report, tmp_path):
    browser = _browser_or_skip()
    try:
        browser.get(html_report.path.resolve().as_uri())
        widths = browser.execute_script(
            "return Array.from(document.images).map(i => i.complete ? i.naturalWidth : 0)")
        assert len(widths) == len(html_report.figures)
        assert all(width == figures.FIGURE_PIXELS[0] for width in widths)
        errors = [entry for entry in browser.get_log("browser") if entry["level"] == "SEVERE"]
        assert errors == []
        shot = tmp_path / "page.png"
        assert browser.save_screenshot(str(shot))
    finally:
        browser.quit()
    pixels = matplotlib.image.imread(shot)[..., :3]
    assert pixels.shape[0] >= 800 and pixels.shape[1] >= 800
    # Not blank: a good share of pixels is not the white page, and they vary.
    assert np.mean(pixels.min(axis=-1) < 0.9) > 0.02
    assert pixels.std() > 0.05


def _relative_luminance(colour: str) -> float:
    # Source: WCAG 2.1, definition of relative luminance (sRGB linearised, then
    # 0.2126 R + 0.7152 G + 0.0722 B).
    channels = np.array([int(colour[i:i + 2], 16) / 255 for i in (1, 3, 5)])
    linear = np.where(channels <= 0.04045, channels / 12.92, ((channels + 0.055) / 1.055) ** 2.4)
    return float(linear @ [0.2126, 0.7152, 0.0722])


def test_palette_neighbours_differ_in_lightness_too():
    colours = [colour for _, colour in figures.PALETTE]
    assert len(set(colours)) == len(colours) == len({name for name, _ in figures.PALETTE})
    luminance = [_relative_luminance(colour) for colour in colours]
    # Common practice, no source: neighbours that differ in lightness stay apart in
    # grey print and for readers who confuse hues.
    assert min(abs(a - b) for a, b in zip(luminance, luminance[1:], strict=False)) >= 0.05
    # Against the white page every colour keeps a contrast ratio of 2 or more
    # (WCAG 2.1 contrast ratio (L1 + 0.05) / (L2 + 0.05)).
    assert all(1.05 / (value + 0.05) >= 2.0 for value in luminance)
    styles = figures.agent_colours(["b", "a", "b", "c"])
    assert list(styles) == ["b", "a", "c"] and len({s.colour for s in styles.values()}) == 3
