"""Per-copy random streams: reproducibility per copy and distribution checks."""

import numpy as np
from scipy import stats

from needbench.envs.streams import CopyStreams


def test_copy_i_of_a_batch_equals_a_single_stream():
    keys = np.array([11, 22, 33, 44], dtype=np.uint64)
    batch, single = CopyStreams(keys), CopyStreams(keys[2:3])
    for _ in range(3):
        assert np.array_equal(batch.random((4, 5))[2], single.random((1, 5))[0])
        assert np.array_equal(batch.standard_normal((4, 2))[2], single.standard_normal((1, 2))[0])


def test_subset_and_rekey_keep_other_copies_untouched():
    keys = np.arange(1, 5, dtype=np.uint64)
    a, b = CopyStreams(keys), CopyStreams(keys)
    a.random((4, 3))
    b.random((4, 3))
    mask = np.array([False, True, False, True])
    a.rekey(mask, np.array([99, 98], dtype=np.uint64))
    sub = a.subset(mask)
    sub.random((2, 7))
    a.merge(mask, sub)
    assert np.array_equal(a.random((4, 2))[[0, 2]], b.random((4, 2))[[0, 2]])


def test_uniform_and_normal_distributions():
    # Source: scipy.stats.kstest against the uniform and standard normal laws.
    streams = CopyStreams(np.array([7], dtype=np.uint64))
    assert stats.kstest(streams.random((1, 20000))[0], "uniform").pvalue > 1e-3
    assert stats.kstest(streams.standard_normal((1, 20000))[0], "norm").pvalue > 1e-3
    draws = streams.integers(0, 5, (1, 20000))[0]
    assert set(np.unique(draws)) == {0, 1, 2, 3, 4}
    # Source: scipy.stats.chisquare, equal frequencies of the five values.
    assert stats.chisquare(np.bincount(draws)).pvalue > 1e-3
