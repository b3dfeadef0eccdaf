"""How needbench compiles its kernels: one policy, two decorators.

* ``kernel``: a compiled function called from Python (or from other kernels).
* ``inline_kernel``: a per-copy helper, inlined into the kernel that calls it,
  so that a loop over copies makes no compiled call per copy.

Both cache their machine code on disk (``cache=True``; ``NUMBA_CACHE_DIR``
moves the cache, and numba falls back to a user folder when the package
folder is read-only), never use ``fastmath`` (results stay exact IEEE
arithmetic, so the golden trajectories hold), and follow NumPy's error model
(a division by zero gives inf or NaN, as NumPy does, rather than raising).

They also switch off numba's reference counting (``_nrt=False``, a
long-standing numba compiler flag). The kernels never allocate: every array
is made by the Python shell and outlives the call, so there is nothing to
count, while counting costs an atomic call per array argument per compiled
call, which in a loop over copies dominated the step (measured: the reward
assembly of 1024 copies took 166 us with it and 20 us without). A kernel that
must allocate has to be compiled with plain ``numba.njit`` instead.

A cached kernel holds the code of every helper inlined into it, from other
files too, while numba checks only the freshness of the kernel's own file.
So the freshness stamp of every needbench kernel also carries a digest of all
engine sources (this folder and ``tasks/``): editing any of them recompiles
every kernel once, instead of running stale inlined code.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

from numba import njit

_SOURCES = Path(__file__).parent


def _engine_digest() -> str:
    digest = hashlib.sha256()
    for path in sorted([*_SOURCES.glob("*.py"), *_SOURCES.glob("tasks/*.py")]):
        digest.update(path.name.encode())
        digest.update(path.read_bytes())
    return digest.hexdigest()


ENGINE_DIGEST = _engine_digest()


def _compiler(**options):
    def decorate(function):
        dispatcher = njit(cache=True, error_model="numpy", _nrt=False, **options)(function)
        cache_file = getattr(getattr(dispatcher, "_cache", None), "_cache_file", None)
        if cache_file is not None and hasattr(cache_file, "_source_stamp"):
            cache_file._source_stamp = (cache_file._source_stamp, ENGINE_DIGEST)
        return dispatcher

    return decorate


kernel = _compiler()
inline_kernel = _compiler(inline="always")
