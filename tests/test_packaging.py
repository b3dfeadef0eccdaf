"""The package installs as one `needbench` namespace from a built wheel too."""

import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def wheel(tmp_path_factory):
    out = tmp_path_factory.mktemp("wheel")
    # No build isolation: the installed setuptools builds it, with no download.
    subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation",
                    "--quiet", "-w", str(out), str(ROOT)], check=True)
    (path,) = out.glob("needbench-*.whl")
    return path


def test_wheel_maps_the_three_folders_into_the_namespace(wheel):
    names = set(zipfile.ZipFile(wheel).namelist())
    for expected in ("needbench/envs/physiology.py", "needbench/agents/base.py",
                     "needbench/agents/deep/vec_env.py",
                     "needbench/benchmarks/cli.py", "needbench/benchmarks/suites/quickstart.toml",
                     "needbench/benchmarks/suites/phenomena/overconsumption.toml",
                     "needbench/benchmarks/phenomena/__init__.py",
                     "needbench/benchmarks/phenomena/tradeoff.py",
                     "needbench/benchmarks/perf/__main__.py"):
        assert expected in names
    assert not any(name.startswith(("envs/", "agents/", "benchmarks/", "tests/"))
                   for name in names)


def test_wheel_imports_away_from_the_checkout(wheel, tmp_path):
    site = tmp_path / "site"
    zipfile.ZipFile(wheel).extractall(site)
    code = ("import needbench.envs, needbench.agents, needbench.benchmarks.cli as cli, "
            "gymnasium as gym; gym.make('needbench/Menu-v0').reset(seed=0); "
            "print(needbench.envs.__file__)")
    result = subprocess.run([sys.executable, "-c", code], cwd=tmp_path, capture_output=True,
                            text=True, env={"PYTHONPATH": str(site), "PATH": "/usr/bin:/bin"},
                            check=True)
    assert result.stdout.strip().startswith(str(site))
