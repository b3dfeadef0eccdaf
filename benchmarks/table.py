"""The results table: one row per (suite, task, agent, sweep point), as text, JSON or CSV.

Each cell holds, per metric of :data:`TABLE_METRICS`, the interquartile mean
over the cell's runs of each run's mean over its evaluation episodes, with a
95% stratified bootstrap interval (:mod:`needbench.benchmarks.stats`). The
bootstrap is seeded (:data:`TABLE_SEED`), so the same store always gives the
same table.
"""

from __future__ import annotations

import csv
import io
import json
import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

#: The results table: (metric key of a run summary, column title, higher is better).
TABLE_METRICS = (
    ("return", "return", True),
    ("discounted_drive", "discounted drive", False),
    ("time_in_band", "time in band", True),
    ("survival", "survival", True),
)

#: Bootstrap resamples behind each confidence interval of the results table.
TABLE_REPETITIONS = 2000
#: Seed of the bootstrap, so the same store always prints the same table.
TABLE_SEED = 0


@dataclass
class Cell:
    """One row of the results table: the runs of one agent on one task at one sweep point.

    ``estimates[metric]`` is (IQM, low, high) of the runs' mean scores, with
    the 95% stratified bootstrap interval of benchmarks.stats; None when no
    run has a finite value.
    """

    suite: str
    task_id: str
    agent: str
    sweep: str
    runs: int
    failed: int
    estimates: dict[str, tuple[float, float, float] | None]


def _estimate(values: list[float], higher_is_better: bool) -> tuple[float, float, float] | None:
    from needbench.benchmarks.stats import bootstrap_ci, interquartile_mean

    finite = [value for value in values if value is not None and math.isfinite(value)]
    if not finite:
        return None
    sign = 1.0 if higher_is_better else -1.0
    # The stats functions score higher-is-better; a cost is negated and turned back after.
    estimate = bootstrap_ci(sign * np.asarray(finite), interquartile_mean,
                            np.random.default_rng(TABLE_SEED), confidence=0.95,
                            repetitions=TABLE_REPETITIONS)
    bounds = sorted((sign * estimate.low, sign * estimate.high))
    return sign * estimate.value, bounds[0], bounds[1]


def result_cells(store, hashes: Iterable[str] | None = None) -> list[Cell]:
    """The results table of a store (only runs with the given hashes, when given)."""
    wanted = set(hashes) if hashes is not None else None
    groups: dict[tuple[str, str, str, str], list[dict[str, Any]]] = {}
    for row in store.run_summaries():
        if wanted is not None and row["hash"] not in wanted:
            continue
        key = (row["suite"], row["task_id"], row["agent"], row["sweep"])
        groups.setdefault(key, []).append(row)
    cells = []
    for (suite, task_id, agent, sweep), rows in sorted(groups.items()):
        done = [row for row in rows if row["status"] == "done"]
        estimates = {key: _estimate([row.get(key) for row in done], higher)
                     for key, _, higher in TABLE_METRICS}
        cells.append(Cell(suite, task_id, agent, sweep, len(done), len(rows) - len(done),
                          estimates))
    return cells


def _sweep_text(sweep: str) -> str:
    point = json.loads(sweep) if sweep else {}
    return " ".join(f"{key}={json.dumps(value)}" for key, value in sorted(point.items()))


def _number(value: float) -> str:
    return f"{value:.3g}"


def format_table(cells: Sequence[Cell]) -> str:
    """The results table as aligned text: one row per cell, IQM [95% CI] per metric."""
    if not cells:
        return "no runs recorded"
    show_suite = len({cell.suite for cell in cells}) > 1
    show_sweep = any(cell.sweep not in ("", "{}") for cell in cells)
    header = (["suite"] if show_suite else []) + ["task", "agent"] \
        + (["sweep"] if show_sweep else []) + ["runs", "failed"] \
        + [f"{title} IQM [95% CI]" for _, title, _ in TABLE_METRICS]
    rows = []
    for cell in cells:
        row = ([cell.suite] if show_suite else []) + [cell.task_id.removeprefix("needbench/"),
                                                      cell.agent]
        row += [_sweep_text(cell.sweep)] if show_sweep else []
        row += [str(cell.runs), str(cell.failed)]
        for key, _, _ in TABLE_METRICS:
            estimate = cell.estimates[key]
            row.append("n/a" if estimate is None else
                       f"{_number(estimate[0])} [{_number(estimate[1])}, {_number(estimate[2])}]")
        rows.append(row)
    widths = [max(len(line[i]) for line in [header, *rows]) for i in range(len(header))]
    lines = ["  ".join(text.ljust(width) for text, width in zip(line, widths, strict=True))
             .rstrip() for line in [header, *rows]]
    lines.insert(1, "  ".join("-" * width for width in widths))
    lines.append("(discounted drive: lower is better; the others: higher is better. "
                 "IQM over runs, each run the mean of its evaluation episodes.)")
    return "\n".join(lines)


def _cell_record(cell: Cell) -> dict[str, Any]:
    record: dict[str, Any] = {"suite": cell.suite, "task": cell.task_id, "agent": cell.agent,
                              "sweep": json.loads(cell.sweep) if cell.sweep else {},
                              "runs": cell.runs, "failed": cell.failed}
    for key, _, higher in TABLE_METRICS:
        estimate = cell.estimates[key]
        record[key] = None if estimate is None else {
            "iqm": estimate[0], "low": estimate[1], "high": estimate[2],
            "confidence": 0.95, "higher_is_better": higher}
    return record


def table_json(cells: Sequence[Cell]) -> str:
    return json.dumps([_cell_record(cell) for cell in cells], indent=2)


def table_csv(cells: Sequence[Cell]) -> str:
    columns = ["suite", "task", "agent", "sweep", "runs", "failed"]
    for key, _, _ in TABLE_METRICS:
        columns += [f"{key}_iqm", f"{key}_low", f"{key}_high"]
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(columns)
    for cell in cells:
        row: list[Any] = [cell.suite, cell.task_id, cell.agent, _sweep_text(cell.sweep),
                          cell.runs, cell.failed]
        for key, _, _ in TABLE_METRICS:
            estimate = cell.estimates[key]
            row += ["", "", ""] if estimate is None else list(estimate)
        writer.writerow(row)
    return buffer.getvalue()
