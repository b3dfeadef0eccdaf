"""Reference results: the file a run's scores ship in, its loader, normalised scores and
their aggregate, the Markdown table, `compare --reference FILE`, and the shipped files."""

from __future__ import annotations

import json
import math
from datetime import datetime
from pathlib import Path

import numpy as np
import pytest
from scipy import stats as scipy_stats

from needbench.benchmarks import reference as ref
from needbench.benchmarks.cli import builtin_suites, load_suite, main
from needbench.benchmarks.runner import RunSettings, run_job
from needbench.benchmarks.spec import expand, parse_suite
from needbench.benchmarks.stats import probability_of_improvement
from needbench.benchmarks.store import JobResult, Store
from needbench.envs.errors import ConfigError

# Menu, where the planner applies (the 1 of its scores), and Shift, where it does not
# (the controller is the 1 there).
PROTOCOL = """
[suite]
name = "{name}"
seeds = {seeds}
eval_episodes = {episodes}
gamma = 0.99

[[task]]
id = "needbench/Menu-v0"
[task.kwargs]
max_steps = {menu_steps}

[[task]]
id = "needbench/Shift-v0"
[task.kwargs]
max_steps = 30
"""

AGENTS = """
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
total_steps = 300
[agent.hyperparameters]
internal_bins = 4
world_bins = 1
"""

RANDOM = """
[[agent]]
name = "random"
total_steps = 0
"""

MINE = """
[[agent]]
name = "tabular-q"
total_steps = 900
[agent.hyperparameters]
internal_bins = 4
world_bins = 1
"""


def _suite_text(name: str, agents: str, *, seeds=(0, 1, 2), episodes: int = 2,
                menu_steps: int = 30) -> str:
    return PROTOCOL.format(name=name, seeds=list(seeds), episodes=episodes,
                           menu_steps=menu_steps) + agents


def _run(folder: Path, text: str) -> Path:
    """Every job of the suite, in this process (the job function the pool runs), recorded
    in ``folder/results.sqlite3``; pairs that do not apply are not recorded, as in a run."""
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "suite.toml").write_text(text)
    suite = parse_suite(folder / "suite.toml")
    with Store(folder / "results.sqlite3") as store:
        for job in expand(suite):
            result = run_job(job.config, job.hash, RunSettings(git_revision="0" * 40))
            if isinstance(result, JobResult):
                assert result.status == "done", result.error
                store.record_job(result)
    return folder


@pytest.fixture(scope="module")
def tiny(tmp_path_factory):
    """A run of the tiny suite and the reference file built from it with the CLI."""
    folder = _run(tmp_path_factory.mktemp("tiny") / "out", _suite_text("tiny", AGENTS))
    path = folder.parent / "tiny.json"
    assert main(["reference", "build", str(folder), "--out", str(path)]) == 0
    return folder, path, ref.load_reference(path)


@pytest.fixture(scope="module")
def mine(tmp_path_factory):
    """A user's own run: only their tabular-q (another budget), under the reference's protocol."""
    return _run(tmp_path_factory.mktemp("mine") / "out", _suite_text("mine", MINE))


# ----------------------------------------------------------------------------
# The file and its builder
# ----------------------------------------------------------------------------

def test_the_file_holds_every_done_run_with_its_metric_means_and_the_header(tiny):
    folder, path, loaded = tiny
    suite = parse_suite(folder / "suite.toml")
    with Store(folder / "results.sqlite3") as store:
        runs = {run["hash"]: run for run in store.runs(status="done")}
        episodes: dict[str, list[dict[str, float]]] = {}
        for episode in store.episodes():
            episodes.setdefault(episode["hash"], []).append(episode["metrics"])
    assert {run.hash for run in loaded.runs} == set(runs)
    # The builder's coverage agrees with the applicability probe the shipped-file test uses.
    assert set(runs) == {job.hash for job in ref.applicable_jobs(suite)}
    assert {(run.task_id, run.agent) for run in loaded.runs if run.agent == "exact-planner"} \
        == {("needbench/Menu-v0", "exact-planner")}
    for run in loaded.runs:
        stored = runs[run.hash]
        assert (run.task_id, run.agent, run.seed, run.sweep) == (
            stored["task_id"], stored["agent"], stored["seed"], stored["sweep"])
        assert run.episodes == len(episodes[run.hash]) == 2
        for key in ("discounted_drive", "return", "time_in_band"):
            assert run.metrics[key] == pytest.approx(
                np.mean([metrics[key] for metrics in episodes[run.hash]]), rel=1e-12)
        assert run.metrics["survival"] == np.mean([m["survived"] for m in episodes[run.hash]])
    assert loaded.suite == "tiny"
    assert loaded.protocol == {"eval_episodes": 2, "gamma": 0.99, "tasks": {
        "needbench/Menu-v0": {"max_steps": 30}, "needbench/Shift-v0": {"max_steps": 30}}}
    assert loaded.git_revisions == ("0" * 40,) and len(loaded.package_versions) == 1
    assert loaded.command == f"needbench reference build {folder} --out {path}"
    assert datetime.fromisoformat(loaded.made).tzinfo is not None
    assert loaded.wall_seconds == pytest.approx(sum(run["wall_seconds"] for run in runs.values()))
    # One line per run after an indented header: valid JSON, compact, no SQLite inside.
    text = path.read_text()
    assert json.loads(text)["format"] == ref.FORMAT
    assert sum(line.strip().startswith('{"hash"') for line in text.splitlines()) == len(runs)


def test_a_reference_holds_one_protocol_so_a_gamma_sweep_is_refused(tmp_path, capsys):
    text = _suite_text("swept", RANDOM, seeds=(0,)) + """
[[sweep]]
target = "gamma"
values = [0.9, 0.99]
"""
    folder = _run(tmp_path / "out", text)
    assert main(["reference", "build", str(folder), "--out", str(tmp_path / "x.json")]) == 2
    error = capsys.readouterr().err
    assert "gamma" in error and "one protocol" in error and "Traceback" not in error
    assert not (tmp_path / "x.json").exists()


def test_a_store_of_several_suites_needs_suite(tiny, mine, tmp_path, capsys):
    folder = tmp_path / "both"
    folder.mkdir()
    with Store(folder / "results.sqlite3") as both:
        for source in (tiny[0], mine):
            with Store(source / "results.sqlite3") as store:
                for run in store.runs(status="done"):
                    episodes = [e["metrics"] for e in store.episodes(run["hash"])]
                    both.record_job(JobResult(
                        hash=run["hash"], config=run["config"], status="done", started=0.0,
                        finished=1.0, wall_seconds=run["wall_seconds"], episodes=episodes))
    assert main(["reference", "build", str(folder), "--out", str(tmp_path / "r.json")]) == 2
    error = capsys.readouterr().err
    assert "--suite" in error and "mine, tiny" in error
    assert main(["reference", "build", str(folder), "--out", str(tmp_path / "r.json"),
                 "--suite", "mine"]) == 0
    assert {run.agent for run in ref.load_reference(tmp_path / "r.json").runs} == {"tabular-q"}


def _corrupt(path: Path, out: Path, change) -> Path:
    document = json.loads(path.read_text())
    change(document)
    out.write_text(json.dumps(document))
    return out


@pytest.mark.parametrize(("change", "named"), [
    (lambda d: d.update(format="something-else"), "format"),
    (lambda d: d.update(format_version=99), "format_version"),
    (lambda d: d["protocol"].pop("gamma"), "protocol.gamma"),
    (lambda d: d["protocol"].update(eval_episodes=0), "protocol.eval_episodes"),
    (lambda d: d.update(made="yesterday"), "made"),
    (lambda d: d.update(runs=[]), "runs"),
    (lambda d: d["runs"][1].update(hash="xyz"), "runs[1].hash"),
    (lambda d: d["runs"][2].update(hash=d["runs"][0]["hash"]), "runs[2].hash"),
    (lambda d: d["runs"][0].update(task="needbench/Forage-v0"), "runs[0].task"),
    (lambda d: d["runs"][0].update(episodes=3), "runs[0].episodes"),
    (lambda d: d["runs"][0].update(seed=True), "runs[0].seed"),
    (lambda d: d["runs"][3]["metrics"].update(discounted_drive="low"),
     "runs[3].metrics.discounted_drive"),
    (lambda d: d["runs"][3]["metrics"].pop("return"), "runs[3].metrics.return"),
])
def test_a_malformed_file_is_a_config_error_naming_the_key(tiny, tmp_path, change, named):
    bad = _corrupt(tiny[1], tmp_path / "bad.json", change)
    with pytest.raises(ConfigError) as raised:
        ref.load_reference(bad)
    assert raised.value.path == named and str(bad) in str(raised.value)


def test_names_text_and_files_that_are_no_reference(tmp_path, capsys):
    with pytest.raises(ConfigError, match="a shipped reference"):
        ref.load_reference("no-such-reference")
    (tmp_path / "broken.json").write_text("{ not json")
    with pytest.raises(ConfigError, match="a JSON reference file"):
        ref.load_reference(tmp_path / "broken.json")
    assert main(["reference", "table", str(tmp_path / "broken.json")]) == 2
    assert "Traceback" not in capsys.readouterr().err


# ----------------------------------------------------------------------------
# Normalised scores and their aggregate
# ----------------------------------------------------------------------------

def test_scores_are_0_at_random_and_1_at_the_better_of_planner_and_controller(tiny):
    loaded = tiny[2]

    def best(task_id, metric):
        means = {agent: np.mean([run.metrics[metric] for run in loaded.runs_of(task_id, agent)])
                 for agent in ("exact-planner", "setpoint-controller")
                 if loaded.runs_of(task_id, agent)}
        pick = max if metric == "return" else min
        return pick(means, key=means.get)

    for task_id in ("needbench/Menu-v0", "needbench/Shift-v0"):
        for metric in ("discounted_drive", "return"):
            ceiling = best(task_id, metric)
            base = ref.baseline(loaded, task_id, metric)
            floor = np.mean([run.metrics[metric] for run in loaded.runs_of(task_id, "random")])
            top = np.mean([run.metrics[metric] for run in loaded.runs_of(task_id, ceiling)])
            assert (base.ceiling_agent, base.floor, base.ceiling) == (ceiling, floor, top)
            scores = ref.normalised_scores(loaded, metric)[task_id]
            tabular = [run.metrics[metric] for run in loaded.runs_of(task_id, "tabular-q")]
            np.testing.assert_allclose(scores["tabular-q"],
                                       (np.array(tabular) - floor) / (top - floor))
            assert np.mean(scores["random"]) == pytest.approx(0.0, abs=1e-12)
            assert np.mean(scores[ceiling]) == pytest.approx(1.0, abs=1e-12)
    # Both scores are higher-is-better: the controller keeps the drive far below random's.
    assert ref.baseline(loaded, "needbench/Shift-v0", "discounted_drive").ceiling < \
        ref.baseline(loaded, "needbench/Shift-v0", "discounted_drive").floor


def _edited(loaded: ref.Reference, task_id: str, agent: str, metric: str, value) -> ref.Reference:
    """The reference with ``agent``'s ``metric`` on ``task_id`` replaced by value(seed)."""
    runs = tuple(
        ref.ReferenceRun(run.hash, run.task_id, run.agent, run.seed, run.sweep, run.episodes,
                         run.total_steps, run.wall_seconds,
                         {**run.metrics, metric: value(run.seed)})
        if (run.task_id, run.agent) == (task_id, agent) else run for run in loaded.runs)
    return ref.Reference(loaded.suite, loaded.protocol, loaded.package_versions,
                         loaded.git_revisions, loaded.made, loaded.command, loaded.wall_seconds,
                         loaded.elapsed_seconds, runs, loaded.source)


def test_a_zero_denominator_is_a_clear_error_and_a_backward_task_is_named(tiny):
    loaded = tiny[2]
    shift = "needbench/Shift-v0"
    random_drive = {run.seed: run.metrics["discounted_drive"]
                    for run in loaded.runs_of(shift, "random")}
    same = _edited(loaded, shift, "setpoint-controller", "discounted_drive", random_drive.get)
    with pytest.raises(ConfigError, match="divides by zero"):
        ref.baseline(same, shift, "discounted_drive")
    worse = _edited(loaded, shift, "setpoint-controller", "discounted_drive",
                    lambda seed: random_drive[seed] + 10.0)
    assert "On needbench/Shift-v0 (discounted drive: setpoint-controller" in \
        ref.markdown_table(worse)
    assert "does worse than random" not in ref.markdown_table(loaded)


def test_the_aggregate_is_the_iqm_with_a_stratified_bootstrap_interval(tiny):
    loaded = tiny[2]
    scores = ref.normalised_scores(loaded, "discounted_drive")
    by_task = {task: by_label["tabular-q"] for task, by_label in scores.items()}
    result = ref.aggregate_score(by_task)
    matrix = np.stack([by_task["needbench/Menu-v0"], by_task["needbench/Shift-v0"]], axis=1)
    # Source: scipy.stats.trim_mean(x, 0.25) is the interquartile mean of the flattened scores.
    assert result.value == pytest.approx(scipy_stats.trim_mean(matrix.ravel(), 0.25))
    # A bootstrap built by hand with the same generator: within each task, runs drawn with
    # replacement (Agarwal et al. 2021), the 2.5 and 97.5 percentiles of the resampled IQMs.
    rng = np.random.default_rng(0)
    rows = rng.integers(0, matrix.shape[0], size=(2000, *matrix.shape))
    resampled = np.take_along_axis(np.broadcast_to(matrix, rows.shape), rows, axis=1)
    iqms = scipy_stats.trim_mean(resampled.reshape(2000, -1), 0.25, axis=1)
    low, high = np.percentile(iqms, [2.5, 97.5])
    assert (result.low, result.high) == pytest.approx((low, high))
    assert (result.runs, result.tasks) == (3, 2)
    # The planner runs on Menu only: its aggregate is over that task, and says so.
    planner = dict(ref.ranking(loaded))["exact-planner"]
    assert (planner.tasks, planner.of_tasks) == (1, 2)
    assert planner.value == pytest.approx(
        scipy_stats.trim_mean(scores["needbench/Menu-v0"]["exact-planner"], 0.25))


def test_the_markdown_table_has_every_task_agent_and_the_ranking(tiny, capsys):
    folder, path, loaded = tiny
    assert main(["reference", "table", str(path)]) == 0
    table = capsys.readouterr().out
    for task_id in loaded.task_ids():
        assert f"**{task_id}**" in table
    for task_id in loaded.task_ids():  # each task's 1 on each metric is marked in its rows
        drive = ref.baseline(loaded, task_id, "discounted_drive").ceiling_agent
        pay = ref.baseline(loaded, task_id, "return").ceiling_agent
        section = table.split(f"**{task_id}**")[1].split("**")[0]
        marked = {line.split(" | ")[0].strip("| "): None for line in section.splitlines()
                  if line.startswith("| ") and (" *" in line.split(" | ")[0]
                                                or " +" in line.split(" | ")[0])}
        expected = {drive: "*", pay: "+"} if drive != pay else {drive: "*+"}
        assert marked.keys() == {f"{label} {mark}" for label, mark in expected.items()}
    assert loaded.command in table and loaded.made[:10] in table
    ranked = [label for label, _ in ref.ranking(loaded)]
    rows = [line for line in table.splitlines() if line.startswith("| ") and
            line.split(" | ")[0].strip("| ").isdigit()]
    assert [row.split(" | ")[1] for row in rows] == ranked
    values = [aggregate.value for _, aggregate in ref.ranking(loaded)]
    assert values == sorted(values, reverse=True)
    tabular = dict(ref.ranking(loaded))["tabular-q"]
    assert f"| tabular-q | 2/2 | {ref.score_number(tabular.value)} [" in table


# ----------------------------------------------------------------------------
# compare DIR --reference FILE
# ----------------------------------------------------------------------------

def test_compare_puts_your_runs_beside_the_reference(tiny, mine, capsys):
    _, path, loaded = tiny
    assert main(["compare", str(mine), "--reference", str(path), "--json"]) == 0
    record = json.loads(capsys.readouterr().out)
    assert record["tasks"] == ["needbench/Menu-v0", "needbench/Shift-v0"]
    assert (mine / "compare-reference-tiny" / "comparison.json").is_file()
    with Store(mine / "results.sqlite3") as store:
        summaries = {row["hash"]: row for row in store.run_summaries()}
        runs = store.runs(status="done")
    ours = {}
    for task_id in record["tasks"]:
        base = ref.baseline(loaded, task_id, "discounted_drive")
        values = [summaries[run["hash"]]["discounted_drive"]
                  for run in sorted(runs, key=lambda run: run["seed"])
                  if run["task_id"] == task_id]
        ours[task_id] = (np.array(values) - base.floor) / (base.ceiling - base.floor)
        standing = next(s for s in record["standings"]
                        if s["task_id"] == task_id and s["source"] == "yours")
        mean, iqm = standing["scores"]["discounted_drive"][:2]
        assert mean == pytest.approx(np.mean(ours[task_id]))
        # Source: scipy.stats.trim_mean(x, 0.25) is the interquartile mean.
        assert iqm == pytest.approx(scipy_stats.trim_mean(ours[task_id], 0.25))
    shipped = ref.normalised_scores(loaded, "discounted_drive")
    for theirs in ("random", "setpoint-controller", "tabular-q", "exact-planner"):
        pairing = next(p for p in record["pairings"] if p["shipped"] == theirs
                       and p["metric"] == "discounted_drive")
        common = [task for task in record["tasks"] if theirs in shipped[task]]
        x = np.stack([ours[task] for task in common], axis=1)
        y = np.stack([shipped[task][theirs] for task in common], axis=1)
        assert pairing["tasks"] == len(common)
        # P(X > Y) directly: the share of (x, y) run pairs of a task that x wins (1/2 on a
        # tie), averaged over tasks (Agarwal et al. 2021).
        direct = np.mean([np.mean((np.sign(x[:, None, j] - y[None, :, j]) + 1) / 2)
                          for j in range(len(common))])
        assert pairing["probability"][0] == pytest.approx(direct)
        assert pairing["probability"][0] == pytest.approx(probability_of_improvement(x, y))
        assert pairing["difference"][0] == pytest.approx(
            scipy_stats.trim_mean(x.ravel(), 0.25) - scipy_stats.trim_mean(y.ravel(), 0.25))
        low, high = pairing["probability"][1:]
        assert low <= pairing["probability"][0] <= high
    aggregate = record["aggregates"]["tabular-q"]["discounted_drive"]
    assert (aggregate["tasks"], aggregate["of_tasks"]) == (2, 2)
    assert record["aggregates"]["exact-planner (tiny)"]["return"]["tasks"] == 1

    assert main(["compare", str(mine), "--reference", str(path)]) == 0
    text = capsys.readouterr().out
    assert "Menu-v0" in text and "tabular-q (tiny)" in text and "P(yours > shipped)" in text


def test_the_reference_against_itself_is_even(tiny, capsys):
    folder, path, _ = tiny
    assert main(["compare", str(folder), "--reference", str(path), "--agents", "tabular-q",
                 "tabular-q", "--metric", "return", "--json"]) == 0
    record = json.loads(capsys.readouterr().out)
    assert [(p["yours"], p["shipped"], p["metric"]) for p in record["pairings"]] == [
        ("tabular-q", "tabular-q", "return")]
    assert record["pairings"][0]["probability"][0] == 0.5
    assert record["pairings"][0]["difference"][0] == pytest.approx(0.0, abs=1e-12)


@pytest.mark.parametrize(("options", "named", "shown"), [
    ({"episodes": 3}, "eval_episodes", "3"),
    ({"seeds": (0, 7)}, "seed", "7"),
    ({"menu_steps": 31}, "task.kwargs", "31"),
])
def test_compare_refuses_another_protocol_naming_what_differs(tiny, tmp_path, capsys, options,
                                                              named, shown):
    folder = _run(tmp_path / "other", _suite_text("other", RANDOM, **options))
    assert main(["compare", str(folder), "--reference", str(tiny[1])]) == 2
    error = capsys.readouterr().err
    assert f": {named} = " in error and shown in error and "Traceback" not in error
    assert "reference's" in error or "a seed the reference has" in error


def test_compare_leaves_out_tasks_the_reference_lacks_and_checks_its_options(tiny, tmp_path,
                                                                             capsys):
    text = _suite_text("extra", RANDOM) + """
[[task]]
id = "needbench/Gamble-v0"
[task.kwargs]
max_steps = 20
"""
    folder = _run(tmp_path / "extra", text)
    assert main(["compare", str(folder), "--reference", str(tiny[1]), "--json"]) == 0
    record = json.loads(capsys.readouterr().out)
    assert "needbench/Gamble-v0" in record["left_out"] and "Gamble-v0" not in record["tasks"]
    assert any("Left out: needbench/Gamble-v0" in note for note in record["notes"])
    assert main(["compare", str(folder), "--reference", str(tiny[1]), "--metric",
                 "time_in_band"]) == 2
    assert "--metric" in capsys.readouterr().err
    assert main(["compare", str(folder), "--reference", str(tiny[1]), "--agents", "ppo",
                 "random"]) == 2
    assert "an agent of your runs: random" in capsys.readouterr().err
    assert main(["compare", str(folder)]) == 2
    assert "--agents" in capsys.readouterr().err
    assert main(["compare", str(folder), "--reference", "no-such-reference"]) == 2
    assert "a shipped reference (" in capsys.readouterr().err


# ----------------------------------------------------------------------------
# The shipped files
# ----------------------------------------------------------------------------

SHIPPED = ref.shipped_references()


@pytest.mark.parametrize("name", sorted(SHIPPED))
def test_a_shipped_reference_covers_its_suite_exactly(name):
    loaded = ref.load_reference(name)
    assert loaded.suite == name
    suites = builtin_suites()
    assert name in suites, f"{SHIPPED[name]} has no built-in suite {name!r} to match"
    suite = load_suite(name)
    assert loaded.protocol == {"eval_episodes": suite.eval_episodes, "gamma": suite.gamma,
                               "tasks": {task.id: task.kwargs for task in suite.tasks}}
    jobs = ref.applicable_jobs(suite)
    expected = {job.hash: job for job in jobs}
    found = {run.hash: run for run in loaded.runs}
    missing = sorted(f"{job.task_id} {job.agent_name} seed={job.seed}"
                     for job_hash, job in expected.items() if job_hash not in found)
    extra = sorted(f"{run.task_id} {run.agent} seed={run.seed}"
                   for run_hash, run in found.items() if run_hash not in expected)
    assert not missing and not extra, (
        f"{SHIPPED[name]} does not match the {name} suite: {len(missing)} jobs missing "
        f"(e.g. {missing[:3]}), {len(extra)} runs of no current job (e.g. {extra[:3]}); "
        f"rebuild it with `needbench reference build DIR --out {SHIPPED[name]}`")
    assert {(job.task_id, job.agent_name) for job in jobs} == \
        {(run.task_id, run.agent) for run in loaded.runs}
    for run in loaded.runs:
        assert run.seed in suite.seeds and all(math.isfinite(run.metrics[key])
                                               for key in ref.SCORED_METRICS)
    ref.ranking(loaded)  # every task has its 0 and 1


def test_the_core_reference_is_shipped():
    assert "core" in SHIPPED
