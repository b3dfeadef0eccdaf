"""The compiled engine: its compile policy, its on-disk cache and its episode keys."""

import os
import shutil
import subprocess
import sys
import textwrap
from pathlib import Path

import gymnasium as gym
import numpy as np
import pytest

import needbench.envs  # noqa: F401  (registers the tasks)
from needbench.envs import compiled
from needbench.envs.engine import settle_all
from needbench.envs.streams import EpisodeKeys, key_from
from needbench.envs.tasks import menu

REPOSITORY = Path(__file__).resolve().parents[1]


def test_every_kernel_cache_is_stamped_with_the_engine_sources():
    # A kernel inlines helpers from other files, which numba's own freshness
    # check (the kernel's file) does not see; the stamp carries all of them.
    for kernel in (settle_all, menu._step, menu.draw_outcome):
        stamp = kernel._cache._cache_file._source_stamp
        assert stamp[1] == compiled.ENGINE_DIGEST
    assert len(compiled.ENGINE_DIGEST) == 64


def test_kernels_follow_one_policy():
    from numba.core.caching import FunctionCache

    for kernel in (settle_all, menu._step):
        assert isinstance(kernel._cache, FunctionCache)  # cache=True
        assert not kernel.targetoptions.get("fastmath", False)
        assert kernel.targetoptions["_nrt"] is False
    assert menu.draw_outcome.targetoptions["inline"] == "always"


def test_episode_keys_are_each_generators_successive_draws():
    seeds = [3, 4, 5]
    keys = EpisodeKeys([gym.utils.seeding.np_random(s)[0] for s in seeds])
    plain = [gym.utils.seeding.np_random(s)[0] for s in seeds]
    drawn = {i: [] for i in range(3)}
    rng = np.random.default_rng(0)
    for _ in range(200):  # more than one block for some copies
        copies = np.flatnonzero(rng.random(3) < 0.7)
        for i, key in zip(copies, keys.next(copies), strict=True):
            drawn[i].append(key)
    for i, generator in enumerate(plain):
        assert drawn[i] == [key_from(generator) for _ in drawn[i]]


@pytest.mark.slow
def test_cache_in_numba_cache_dir_serves_a_read_only_package(tmp_path):
    # The package copied to a read-only folder, imported from there; the machine
    # code goes to NUMBA_CACHE_DIR, and a second process loads it from there.
    root = tmp_path / "site"
    for folder, name in (("envs", "envs"), ("agents", "agents"), ("benchmarks", "benchmarks")):
        shutil.copytree(REPOSITORY / folder, root / "needbench" / name,
                        ignore=shutil.ignore_patterns("__pycache__"))
    for path in root.rglob("*"):
        path.chmod(0o555 if path.is_dir() else 0o444)
    cache = tmp_path / "cache"
    script = textwrap.dedent(f"""
        import sys
        # Import the copy, not the checkout's editable install.
        sys.meta_path = [f for f in sys.meta_path if "editable" not in type(f).__module__.lower()
                         and "editable" not in repr(f).lower()]
        sys.path.insert(0, {str(root)!r})
        import gymnasium as gym
        import needbench.envs
        from needbench.envs.tasks import menu
        assert menu.__file__.startswith({str(root)!r}), menu.__file__
        env = gym.make("needbench/Menu-v0")
        env.reset(seed=0)
        env.step(1)
        stats = menu._step.stats
        print(sum(stats.cache_hits.values()), sum(stats.cache_misses.values()))
    """)
    env = {**os.environ, "NUMBA_CACHE_DIR": str(cache)}
    runs = [subprocess.run([sys.executable, "-c", script], env=env, capture_output=True,
                           text=True, check=True).stdout.split() for _ in range(2)]
    assert runs[0] == ["0", "1"]  # compiled, then written to the cache folder
    assert runs[1] == ["1", "0"]  # loaded from it
    assert any(cache.rglob("*.nbi"))
    assert not any(root.rglob("*.nbi"))


def test_a_level_that_stops_being_a_number_is_reported_naming_the_need():
    # A user's need whose dynamics overflow: a huge constant gain, lethal bounds at
    # the edge of float64. The step where the level becomes infinite raises.
    from needbench.envs.errors import ConfigError
    from needbench.envs.needs import Need

    runaway = Need("heat", unit="u", set_point=0.0, band=1.0, lethal_low=-1.7e308,
                   lethal_high=1.7e308, initial_low=0.0, initial_high=0.0, drain=-1e308)
    # (The first step's reward is already infinite: the drive cubes 1e308.)
    env = gym.make("needbench/Menu-v0", extra_needs=(runaway,), disable_env_checker=True)
    env.reset(seed=0)
    env.step(0)  # 1e308: still a number
    with pytest.raises(ConfigError, match=r"needs\.heat.*finite.*step 2 of copy 0"):
        env.step(0)
