"""The phenomena (needbench.benchmarks.phenomena) and their suites
(benchmarks/suites/phenomena/): each suite is run at its own small budget, its
module's ``measure`` reads the effect off the store, and the check asserts
``effect.met`` (the whole 95 % bootstrap interval on the expected side).

``python -m pytest tests/test_phenomena.py -s`` prints the measured effects
quoted in the README.
"""

from __future__ import annotations

import json
import types

import numpy as np
import pytest
from scipy import stats as scipy_stats

from needbench.benchmarks import phenomena
from needbench.benchmarks.cli import EXIT_NOT_MET, builtin_suites, main
from needbench.benchmarks.phenomena import Effect
from needbench.benchmarks.phenomena import _runs as runs
from needbench.benchmarks.store import Store

#: The phenomena this file checks; valuation and risk come with their own branch.
CHECKED = {"phenomena/overconsumption", "phenomena/tradeoff", "phenomena/anticipation",
           "phenomena/allostasis", "phenomena/reserve"}
ELSEWHERE = {"phenomena/valuation", "phenomena/risk"}


def run_and_measure(name: str, folder) -> Effect:
    """Run a phenomenon's suite into ``folder`` through the CLI and measure it."""
    module = phenomena.phenomenon(name)
    assert main(["run", module.SUITE, "--out", str(folder), "--workers", "2", "--quiet"]) == 0
    with Store(folder / "results.sqlite3") as store:
        assert all(run["status"] == "done" for run in store.runs())
        effect = module.measure(store)
    print(f"{name}: {effect.interval_text} {effect.expectation} ({effect.quantity})"
          + (f"; control: {effect.control}" if effect.control else "")
          + f"; met: {effect.met}")
    print(f"  detail: {json.dumps({k: v for k, v in effect.detail.items() if k != 'per_seed'})}")
    return effect


# ----------------------------------------------------------------------------
# The framework
# ----------------------------------------------------------------------------

def test_every_phenomena_suite_has_a_check():
    present = {name for name in builtin_suites() if name.startswith("phenomena/")}
    assert CHECKED <= present, "every phenomenon of this branch has its suite"
    assert present <= CHECKED | ELSEWHERE, "a phenomena suite with no check here or elsewhere"
    # One module per suite, found by the package's own discovery.
    assert {module.SUITE for module in phenomena.phenomena().values()} == present


def test_modules_keep_the_contract():
    found = phenomena.phenomena()
    assert {"overconsumption", "tradeoff", "anticipation", "allostasis"} <= set(found)
    for name, module in found.items():
        assert module.NAME == name and module.SUITE == f"phenomena/{name}"
        assert module.TASK.startswith("needbench/") and module.TITLE
        assert callable(module.measure) and callable(module.figure)
        assert phenomena.suite_name(module).startswith("phenomena-")


def test_an_effect_is_met_only_with_its_whole_interval_and_its_control():
    assert Effect("x", "t", "q", 0.5, 0.1, 0.9, ">").met
    assert not Effect("x", "t", "q", 0.5, -0.1, 0.9, ">").met
    assert Effect("x", "t", "q", 0.5, 0.3, 0.9, "<", 1.0).met
    assert not Effect("x", "t", "q", 0.5, 0.3, 1.1, "<", 1.0).met
    assert not Effect("x", "t", "q", 0.5, 0.3, 0.9, "<", 1.0, control="c", control_met=False).met


def test_spearman_over_bootstrap_rows_agrees_with_scipy():
    rng = np.random.default_rng(3)
    x = np.repeat([0.0, 0.1, 0.3, 1.0, 3.0], 4)
    y = rng.normal(size=(6, x.size)) - x
    y[2, :5] = y[2, 0]  # ties in the scores too
    y[5] = 1.0  # a row with no order
    rho = runs.spearman_rows(x, y)
    for row in range(5):
        # Source: scipy.stats.spearmanr, Spearman's rank correlation with average ranks for ties.
        assert rho[row] == pytest.approx(scipy_stats.spearmanr(x, y[row]).statistic, abs=1e-12)
    assert rho[5] == 0.0


def test_the_mean_interval_agrees_with_scipy_bootstrap():
    values = np.array([0.52, 0.61, 0.44, 0.83, 0.58, 0.71, 0.49, 0.66])
    ours = runs.mean_interval(values)
    # Source: scipy.stats.bootstrap, percentile method (Monte Carlo: a few hundredths apart).
    theirs = scipy_stats.bootstrap((values,), np.mean, method="percentile",
                                   confidence_level=0.95, n_resamples=20000,
                                   random_state=np.random.default_rng(0)).confidence_interval
    assert ours.value == pytest.approx(values.mean())
    assert ours.low == pytest.approx(theirs.low, abs=0.02)
    assert ours.high == pytest.approx(theirs.high, abs=0.02)


# ----------------------------------------------------------------------------
# `needbench run phenomena` and the report, on two small made-up phenomena
# ----------------------------------------------------------------------------

SMALL_SUITE = """
[suite]
name = "phenomena-{name}"
seeds = [0, 1, 2]
eval_episodes = 1

[[task]]
id = "needbench/Menu-v0"
[task.kwargs]
max_steps = 20

[[agent]]
name = "setpoint-controller"
total_steps = 0
"""


def small_phenomenon(folder, name: str, threshold: float):
    """A phenomenon whose effect is the controller's time in band on a short Menu,
    expected above ``threshold`` (it is 1 there: met below 1, not met at 1)."""
    suite = folder / f"{name}.toml"
    suite.write_text(SMALL_SUITE.format(name=name))

    def measure(store):
        grouped = runs.scores(store, f"phenomena-{name}", "time_in_band", lambda run: "all")
        estimate = runs.mean_interval(np.array(list(grouped["all"].values())))
        return Effect(name, "needbench/Menu-v0", "time in band", estimate.value, estimate.low,
                      estimate.high, ">", threshold)

    def figure(store, axes):
        axes.plot([0, 1], [0, 1], label="made up")
        axes.set_title(name)

    return types.SimpleNamespace(NAME=name, TITLE=f"Made-up {name}", TASK="needbench/Menu-v0",
                                 SUITE=str(suite), measure=measure, figure=figure)


@pytest.fixture
def two_phenomena(tmp_path, monkeypatch):
    made = {"steady": small_phenomenon(tmp_path, "steady", 0.5),
            "strict": small_phenomenon(tmp_path, "strict", 0.5)}
    monkeypatch.setattr(phenomena, "phenomena", lambda: made)
    return made


def test_run_phenomena_runs_each_suite_into_its_folder_and_prints_the_table(
        tmp_path, two_phenomena, capsys):
    out = tmp_path / "phen"
    assert main(["run", "phenomena", "--out", str(out), "--workers", "2"]) == 0
    text = capsys.readouterr().out
    for name in two_phenomena:
        assert (out / name / "results.sqlite3").is_file()
    table = text[text.index("phenomenon  "):]
    assert "Made-up steady  Menu-v0" in table and "> 0.5" in table and table.count(" yes") == 2
    effects = json.loads((out / "effects.json").read_text())
    assert [e["phenomenon"] for e in effects] == ["steady", "strict"]
    assert all(e["met"] and e["effect"]["value"] == 1.0 for e in effects)
    # Resumable like any run: a second run skips every job.
    assert main(["run", "phenomena", "--out", str(out), "--workers", "2"]) == 0
    assert capsys.readouterr().out.count("3 jobs already done") == 2
    # The report of the folder: each phenomenon's line of the table and its figure.
    assert main(["report", str(out), "--format", "md"]) == 0
    page = (out / "report.md").read_text()
    assert "| phenomenon | task | measured effect [95 % interval] | expected | met |" in page
    assert "| Made-up steady | Menu-v0 | +1 [+1, +1] (time in band) | &gt; 0.5 | yes |" in page
    assert (out / "report-figures" / "phenomenon-strict.png").is_file()
    # The report of one phenomenon's run has its line and figure too.
    assert main(["report", str(out / "steady")]) == 0
    html = (out / "steady" / "report.html").read_text()
    assert "Made-up steady" in html and "phenomenon-steady.png" in html


def test_run_phenomena_exits_3_when_an_effect_is_not_met(tmp_path, two_phenomena, capsys):
    two_phenomena["strict"] = small_phenomenon(tmp_path, "strict", 1.0)
    out = tmp_path / "phen"
    assert main(["run", "phenomena", "--out", str(out), "--workers", "2", "--quiet"]) \
        == EXIT_NOT_MET == 3
    table = capsys.readouterr().out
    assert "> 1" in table and table.rstrip().splitlines()[-2].endswith("no")


def test_run_phenomena_checks_every_suite_before_making_a_folder(tmp_path, two_phenomena,
                                                                 capsys):
    broken = tmp_path / "strict.toml"
    broken.write_text(SMALL_SUITE.format(name="strict").replace("eval_episodes = 1",
                                                                "eval_episode = 1"))
    assert main(["run", "phenomena", "--out", str(tmp_path / "phen")]) == 2
    assert "eval_episode" in capsys.readouterr().err
    assert not (tmp_path / "phen").exists()


# ----------------------------------------------------------------------------
# Each phenomenon, run at its suite's budget
# ----------------------------------------------------------------------------

@pytest.mark.slow
def test_overconsumption_grows_with_palatability(tmp_path):
    effect = run_and_measure("overconsumption", tmp_path / "out")
    # Learned steady state above the set point with T > 0, against T = 0 (paired seeds).
    assert effect.met and effect.expected == ">" and effect.threshold == 0.0
    assert effect.detail["difference_weight_1"][1] > 0.0
    assert effect.detail["spearman"] > 0 and effect.detail["spearman_p"] < 0.05
    # With T = 0 the fudge is an honest food: the learner stays close to the set point.
    means = effect.detail["means"]
    assert means["0.0"] < means["2.0"] / 2


@pytest.mark.slow
def test_time_in_band_falls_and_return_rises_with_the_task_weight(tmp_path):
    effect = run_and_measure("tradeoff", tmp_path / "out")
    assert effect.met and effect.value < 0 and effect.detail["spearman_p"] < 0.05
    for metric in ("return", "extrinsic_return"):
        rho, p = effect.detail[f"spearman/{metric}"]
        assert rho > 0 and p < 0.05
    assert effect.detail["difference/time_in_band"][2] < 0.0
    assert effect.detail["difference/return"][1] > 0.0


@pytest.mark.slow
def test_hearing_the_horn_a_learner_deviates_less_in_squalls_than_the_controller(tmp_path):
    effect = run_and_measure("anticipation", tmp_path / "out")
    assert effect.met and effect.high < 1.0
    deaf_value, deaf_low, deaf_high = effect.detail["deaf"]
    assert effect.control_met and deaf_high >= 1.0
    # The mechanism: hearing the horn, the learner has the oilskin on when more squalls
    # begin than the controller (which waits for the cold) or the deaf learner.
    worn = effect.detail["oilskin_worn"]
    hearing = worn["tabular-q, hears the horn"]["onset"]
    assert hearing > worn["setpoint-controller"]["onset"] + 0.2
    assert hearing > worn["tabular-q, deaf to the horn"]["onset"] + 0.2


def test_the_seasonal_gain_of_the_set_point_filter_is_as_the_allostasis_docstring_says():
    from scipy import signal

    a, year = 0.002, 400
    # e_{t+1} = (1 - a)(e_t + h_{t+1} - h_t): E / H = (1 - a)(1 - z^-1) / (1 - (1 - a) z^-1).
    # Source: scipy.signal.freqz, the frequency response of a digital filter.
    _, response = signal.freqz([1 - a, -(1 - a)], [1, -(1 - a)], worN=[2 * np.pi / year])
    assert abs(response[0]) == pytest.approx(0.991, abs=5e-4)
    _, steady = signal.freqz([1 - a, -(1 - a)], [1, -(1 - a)], worN=[0.0])
    assert abs(steady[0]) == pytest.approx(0.0, abs=1e-12)


@pytest.mark.slow
def test_adapting_set_points_shrink_the_deviation_a_little_and_let_the_body_drift(tmp_path):
    from scipy import signal

    effect = run_and_measure("allostasis", tmp_path / "out")
    assert effect.met and effect.high < 0.0
    # Only a little: the seasonal swing passes the set-point filter almost whole.
    assert -0.1 < effect.detail["relative"] < 0.0
    assert effect.detail["preset_deviation_difference"][1] > 0.0
    with Store(tmp_path / "out" / "results.sqlite3") as store:
        (run,) = [run for run in store.runs() if run["seed"] == 0 and run["sweep"]
                  ["task.need_overrides"] == {}]
        trace = store.trace(run["hash"], 0)
    a = 0.002
    level, set_point = trace["level"], trace["set_point"]
    # The set points of the stored episode follow s_{t+1} = s_t + a (h_{t+1} - s_t).
    # Source: scipy.signal.lfilter, the same first-order recurrence as a digital filter.
    for k in range(level.shape[1]):
        expected, _ = signal.lfilter([a], [1, -(1 - a)], level[1:, k],
                                     zi=[(1 - a) * set_point[0, k]])
        np.testing.assert_allclose(set_point[1:, k], expected, rtol=0, atol=1e-9)


def reserve_task(**kwargs):
    """Lure with the reserve suite's store need and couplings, as the suite declares them."""
    import gymnasium as gym

    from needbench.benchmarks.spec import load_suite, task_arguments

    (task,) = load_suite(builtin_suites()[phenomena.phenomenon("reserve").SUITE]).tasks
    return gym.make(task.id, **{**task_arguments(task.kwargs), **kwargs})


def test_the_store_is_the_low_pass_filter_of_the_energy_surplus_the_docstring_derives():
    from scipy import signal

    # Energy starts 2 bands above its set point, the store empty; resting, nothing is eaten.
    env = reserve_task(need_overrides={"energy": {"initial_low": 2.0, "initial_high": 2.0}})
    _, info = env.reset(seed=0)
    energy, store = [info["level"][0]], [info["level"][2]]
    for _ in range(60):
        _, _, terminated, truncated, info = env.step(0)  # rest
        energy.append(info["level"][0])
        store.append(info["level"][2])
        assert not (terminated or truncated)
    env.close()
    energy, store = np.array(energy), np.array(store)
    a, b = 0.05, 0.005
    # s_{t+1} = (1 - b) s_t + a max(e_t, 0): the store gains what energy above its set point
    # loses. Source: scipy.signal.lfilter, the direct-form filter of that difference equation.
    predicted = signal.lfilter([0.0, a], [1.0, -(1.0 - b)], np.maximum(energy, 0.0))
    np.testing.assert_allclose(store, predicted, rtol=0, atol=1e-12)
    assert store[-1] > 0.5 and energy[-1] < energy[0]
    assert phenomena.phenomenon("reserve").STEADY_GAIN == pytest.approx(a / b)


@pytest.mark.slow
def test_persistent_overconsumption_fills_the_store(tmp_path):
    effect = run_and_measure("reserve", tmp_path / "out")
    assert effect.met and effect.expected == ">" and effect.threshold == 0.0
    means = effect.detail["means"]
    assert means["2.0"] > 3 * means["0.0"]
    # Within one episode the store stays below the filter's steady state 10 x surplus.
    for weight, bound in effect.detail["steady_content_bound"].items():
        assert means[weight] < bound
