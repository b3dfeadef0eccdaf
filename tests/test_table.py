"""The results table: cells from a store, and the text, JSON and CSV forms."""

from __future__ import annotations

import csv
import io
import json

import numpy as np
import pytest

from needbench.benchmarks.table import (
    TABLE_METRICS,
    Cell,
    format_table,
    result_cells,
    table_csv,
    table_json,
)


class FakeStore:
    """The one method result_cells reads."""

    def __init__(self, rows):
        self.rows = rows

    def run_summaries(self):
        return self.rows


def _row(run: int, status: str = "done", **metrics):
    return {"hash": f"h{run}", "suite": "s", "task_id": "needbench/Menu-v0", "agent": "random",
            "sweep": "", "status": status, **metrics}


def test_cells_group_runs_and_estimate_the_interquartile_mean():
    values = [0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8]
    rows = [_row(i, time_in_band=v, **{"return": v, "discounted_drive": -v, "survival": 1.0})
            for i, v in enumerate(values)] + [_row(99, status="failed")]
    (cell,) = result_cells(FakeStore(rows))
    assert (cell.runs, cell.failed) == (8, 1)
    # Source: scipy.stats.trim_mean with 25% cut is the interquartile mean.
    from scipy import stats

    iqm, low, high = cell.estimates["time_in_band"]
    assert iqm == pytest.approx(stats.trim_mean(values, 0.25))
    assert low <= iqm <= high
    assert cell.estimates["discounted_drive"][0] == pytest.approx(-stats.trim_mean(values, 0.25))
    assert result_cells(FakeStore(rows), hashes=["h0"])[0].runs == 1


def test_text_json_and_csv_hold_the_same_cell():
    estimates = {key: (1.0, 0.5, 1.5) for key, _, _ in TABLE_METRICS}
    estimates["survival"] = None
    cell = Cell("s", "needbench/Menu-v0", "tabular-q", '{"gamma": 0.9}', 5, 0, estimates)
    text = format_table([cell])
    assert "Menu-v0" in text and "gamma=0.9" in text and "n/a" in text
    assert "1 [0.5, 1.5]" in text
    (record,) = json.loads(table_json([cell]))
    assert record["sweep"] == {"gamma": 0.9} and record["survival"] is None
    assert record["return"] == {"iqm": 1.0, "low": 0.5, "high": 1.5, "confidence": 0.95,
                                "higher_is_better": True}
    (row,) = csv.DictReader(io.StringIO(table_csv([cell])))
    assert float(row["return_iqm"]) == 1.0 and row["survival_iqm"] == ""
    assert format_table([]) == "no runs recorded"
    assert np.isfinite(float(row["discounted_drive_high"]))
