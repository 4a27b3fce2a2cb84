"""All numba options live here so cache/parallel/fastmath choices are visible in one place.

Kernels that write simulation state never use fastmath: it would let LLVM reorder float
operations differently per build and break bit-exact replays.
"""
import os

# Passive OpenMP wait: with the default active spin a busy second core stalls the other thread.
os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")
os.environ.setdefault("NUMBA_THREADING_LAYER", "omp")

import numba  # noqa: E402

# `kernel` for serial kernels and per-agent helpers, `parallel_kernel` for prange loops over agents.
kernel = numba.njit(cache=True, nogil=True, fastmath=False, error_model="numpy")
parallel_kernel = numba.njit(cache=True, nogil=True, parallel=True, fastmath=False, error_model="numpy")


def set_threads(n: int) -> None:
    """Use n worker threads for parallel kernels (results do not depend on n)."""
    numba.set_num_threads(int(n))


def max_threads() -> int:
    return int(numba.config.NUMBA_NUM_THREADS)
