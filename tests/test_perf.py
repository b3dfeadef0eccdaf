"""The performance command runs and writes its rows as JSON (it times nothing here)."""

import json
import subprocess
import sys


def test_perf_command_prints_a_table_and_writes_valid_json(tmp_path):
    out = tmp_path / "perf.json"
    result = subprocess.run(
        [sys.executable, "-m", "needbench.benchmarks.perf", "--quick", "--only", "core",
         "--json", str(out)], capture_output=True, text=True, check=True)
    assert "core/B=1024" in result.stdout and "targets met" in result.stdout
    rows = json.loads(out.read_text())
    assert [row["name"] for row in rows] == ["core/B=1024", "core/B=16384"]
    for row in rows:
        assert {"name", "value", "reference", "ratio", "target", "met"} <= set(row)
        assert row["value"] > 0 and row["reference"] > 0
        assert row["ratio"] == row["value"] / row["reference"]
        assert row["met"] == (row["ratio"] >= row["target"])
