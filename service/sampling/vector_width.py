"""Which SIMD width the compiled kernel is built for: the one process-wide setting the sampling
core makes, before numba compiles (or loads from its cache) anything.

LLVM's tuning for Intel server CPUs with AVX-512 prefers 256-bit vectors (to avoid the clock
drop wide instructions once caused), so numba's code uses half the width that numpy's own
``np.exp`` uses on the same CPU. The kernel's fused pass is an exp per logit; on such a CPU,
512-bit vectors make it about a fifth faster (``loadtest/bench_sampling.py``). Numba reads the
target features from ``NUMBA_CPU_FEATURES`` when it makes its code generator (``compiled`` calls
this before importing the kernel); an operator who has set the variable keeps their choice.
"""

from __future__ import annotations

import os
import platform

_OVERRIDE = "NUMBA_CPU_FEATURES"


def prefer_wide_vectors() -> str | None:
    """Ask numba for 512-bit vectors on an x86-64 CPU with AVX-512 (the host's own features,
    plus ``-prefer-256-bit``); returns the feature string set, or None when nothing changed."""
    if os.environ.get(_OVERRIDE) or platform.machine().lower() not in ("x86_64", "amd64"):
        return None
    from llvmlite import binding

    features = binding.get_host_cpu_features().flatten()
    if "+avx512f" not in features.split(","):
        return None
    os.environ[_OVERRIDE] = f"{features},-prefer-256-bit"
    # numba read its environment when it was imported: have it read it again. (It has no
    # effect once numba has made its code generator, which defining a kernel function does.)
    from numba.core import config

    config.reload_config()  # type: ignore[no-untyped-call]
    return os.environ[_OVERRIDE]
