"""The README's teaching path: every code block of that section runs as written."""

from __future__ import annotations

import os
import re
import subprocess
import sys
from pathlib import Path

import pytest

README = Path(__file__).resolve().parents[1] / "README.md"
SECTION = "## Teaching path"


def _blocks() -> list[tuple[str, str]]:
    text = README.read_text(encoding="utf-8")
    start = text.index(SECTION)
    end = text.find("\n## ", start + len(SECTION))
    section = text[start:end if end >= 0 else None]
    return re.findall(r"```(python|bash)\n(.*?)```", section, flags=re.DOTALL)


def test_the_teaching_path_has_its_steps():
    kinds = [kind for kind, _ in _blocks()]
    assert kinds.count("python") == 4 and kinds.count("bash") == 1


@pytest.mark.slow
def test_every_code_block_of_the_teaching_path_runs(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    namespace: dict[str, object] = {"__name__": "__readme__"}
    # The `needbench` script of this interpreter's environment comes first on PATH.
    environment = {**os.environ,
                   "PATH": str(Path(sys.executable).parent) + os.pathsep + os.environ["PATH"]}
    for kind, code in _blocks():
        if kind == "python":
            exec(compile(code, str(README), "exec"), namespace)
        else:
            completed = subprocess.run(["bash", "-euo", "pipefail", "-c", code], cwd=tmp_path,
                                       env=environment, capture_output=True, text=True,
                                       timeout=600, check=False)
            assert completed.returncode == 0, completed.stderr
    assert (tmp_path / "results/quickstart/report.html").is_file()
    assert len(list((tmp_path / "results/quickstart/report-figures").glob("*.png"))) > 20
    assert namespace["d_before"] > namespace["d_after"]
