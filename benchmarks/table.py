"""The results table: one row per (suite, task, agent, sweep point), as text, JSON or CSV.

Each cell holds, per metric of :data:`TABLE_METRICS`, the interquartile mean
over the cell's runs of each run's mean over its evaluation episodes, with its
95% stratified bootstrap interval, estimated as the report estimates it
(:func:`needbench.benchmarks.report.estimate`, seeded, so the same store always
gives the same table); a cell with fewer than 3 runs shows no interval. The
text table fits the terminal unless asked to be wide.
"""

from __future__ import annotations

import csv
import io
import json
import sys
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import Any

#: The results table: (metric key of a run summary, column title, higher is better).
TABLE_METRICS = (
    ("return", "return", True),
    ("discounted_drive", "discounted drive", False),
    ("time_in_band", "time in band", True),
    ("survival", "survival", True),
)


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


def _estimate(values: list[float], higher_is_better: bool
              ) -> tuple[float, float | None, float | None] | None:
    """(IQM, low, high) of the finite values; no interval (None, None) under 3 runs."""
    from needbench.benchmarks.report import estimate

    result = estimate(values, higher_is_better)
    return None if result is None else (result.value, result.low, result.high)


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


def _estimate_text(estimate: tuple[float, float | None, float | None] | None,
                   interval: bool) -> str:
    from needbench.benchmarks.report import number

    if estimate is None:
        return "n/a"
    if not interval or estimate[1] is None:
        return number(estimate[0])
    return f"{number(estimate[0])} [{number(estimate[1])}, {number(estimate[2])}]"


def _table_lines(cells: Sequence[Cell], interval: bool) -> list[str]:
    show_suite = len({cell.suite for cell in cells}) > 1
    show_sweep = any(cell.sweep not in ("", "{}") for cell in cells)
    # Narrowed, the titles lose their suffix and the failed column goes when empty.
    show_failed = interval or any(cell.failed for cell in cells)
    suffix = " IQM [95% CI]" if interval else ""
    header = (["suite"] if show_suite else []) + ["task", "agent"] \
        + (["sweep"] if show_sweep else []) + ["runs"] + (["failed"] if show_failed else []) \
        + [f"{title}{suffix}" for _, title, _ in TABLE_METRICS]
    rows = []
    for cell in cells:
        row = ([cell.suite] if show_suite else []) + [cell.task_id.removeprefix("needbench/"),
                                                      cell.agent]
        row += [_sweep_text(cell.sweep)] if show_sweep else []
        row += [str(cell.runs)] + ([str(cell.failed)] if show_failed else [])
        row += [_estimate_text(cell.estimates[key], interval) for key, _, _ in TABLE_METRICS]
        rows.append(row)
    widths = [max(len(line[i]) for line in [header, *rows]) for i in range(len(header))]
    lines = ["  ".join(text.ljust(width) for text, width in zip(line, widths, strict=True))
             .rstrip() for line in [header, *rows]]
    lines.insert(1, "  ".join("-" * width for width in widths))
    return lines


def format_table(cells: Sequence[Cell], width: int | None = None) -> str:
    """The results table as aligned text: one row per cell, IQM [95% CI] per metric.

    Args:
        width: the columns available (a terminal's width); when the table with
            intervals is wider, it is printed with the IQMs only and a note.
            None: never narrowed (``--wide``, or output that is not a terminal).
    """
    from needbench.benchmarks.report import MIN_RUNS_FOR_INTERVAL

    if not cells:
        return "no runs recorded"
    lines = _table_lines(cells, interval=True)
    notes = ["discounted drive: lower is better; the others: higher is better. IQM over runs, "
             "each run the mean of its evaluation episodes; numbers to 3 significant digits."]
    if width is not None and max(len(line) for line in lines) > width:
        lines = _table_lines(cells, interval=False)
        notes.append(f"Cells: the IQM; 95% intervals left out to fit {width} columns; --wide "
                     "shows them.")
    if any(0 < cell.runs < MIN_RUNS_FOR_INTERVAL for cell in cells):
        notes.append(f"Cells with fewer than {MIN_RUNS_FOR_INTERVAL} runs show the IQM and no "
                     "interval: a bootstrap over one or two runs says nothing about spread.")
    if width is not None:
        import textwrap

        notes = [textwrap.fill(f"({note})", width=max(40, width - 1)) for note in notes]
    else:
        notes = [f"({note})" for note in notes]
    return "\n".join(lines + notes)


def table_width(wide: bool) -> int | None:
    """The width the results table must fit: the terminal's, or None (no limit)."""
    import shutil

    if wide or not sys.stdout.isatty():
        return None
    return shutil.get_terminal_size((100, 20)).columns


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
