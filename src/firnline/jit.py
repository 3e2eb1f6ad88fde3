"""How firnline's compiled code is threaded and built: numba settings for the whole process.

Every module with numba code imports this module before numba compiles anything, so the
settings hold for all of them (kernel, snow sliding, horizons, radiation, forcing). They are
process-wide numba settings; any the user has set (environment variables) win.

Threads
    numba's threading layer is OpenMP with a passive wait policy (``OMP_WAIT_POLICY=passive``),
    so idle worker threads sleep instead of spinning against other programs on a shared
    machine (with the active policy, two threads ran slower than one under a competing load).
    numba's ``workqueue`` layer does not spin either but is not safe when several Python
    threads (dask workers) call compiled code at once, so it is only the fallback.

Vector width
    On a CPU with AVX-512, LLVM by default still prefers 256-bit vectors (its tuning for
    these CPUs). The kernel's inner loop over a chunk's cells is packed float64 arithmetic
    that runs about 14 % faster with 512-bit vectors (``benchmarks/kernel.py``, degree-day:
    5.4-5.6x the numpy add pass with 256-bit vectors, 4.7-4.9x with 512-bit, on this project's
    2-core machine). Element-wise arithmetic gives the same values either way; only the
    packed partial sums of the kernel's daily region sums (fastmath, reassociated) change in
    their last bits with the width. ``NUMBA_CPU_NAME`` or ``NUMBA_CPU_FEATURES`` set by the
    user leave the choice to numba.
"""

from __future__ import annotations

import os

# set before numba starts its threads; never over the user's own choice
os.environ.setdefault("OMP_WAIT_POLICY", "passive")

import numba  # noqa: E402


def choose_threading_layer() -> None:
    """Prefer OpenMP (passive wait) when numba can load it, else numba's workqueue."""
    if "NUMBA_THREADING_LAYER" in os.environ:
        return
    try:
        from numba.np.ufunc import omppool  # noqa: F401
        numba.config.THREADING_LAYER = "omp"
    except ImportError:
        numba.config.THREADING_LAYER = "workqueue"


def wide_vector_features() -> str | None:
    """The host's CPU features with LLVM's 256-bit preference turned off, when the host has
    AVX-512 (else None: nothing to change)."""
    try:
        import llvmlite.binding as ll
        features = ll.get_host_cpu_features()
    except (ImportError, RuntimeError):
        return None
    if not features.get("avx512f") or not numba.config.ENABLE_AVX:
        return None
    return features.flatten() + ",-prefer-256-bit"


def choose_vector_width() -> None:
    """512-bit vectors on AVX-512 hosts (see the module docstring), unless the user chose the
    CPU or its features. Takes effect for code numba compiles (or loads from its cache) after
    this call; numba keys its cache by the features, so code built either way is not mixed."""
    if numba.config.CPU_NAME is not None or numba.config.CPU_FEATURES is not None:
        return
    features = wide_vector_features()
    if features is not None:
        numba.config.CPU_FEATURES = features


choose_threading_layer()
choose_vector_width()
