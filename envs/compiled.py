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
"""

from __future__ import annotations

from numba import njit

kernel = njit(cache=True, error_model="numpy", _nrt=False)
inline_kernel = njit(cache=True, error_model="numpy", _nrt=False, inline="always")
