"""The sampling core: pure functions that turn logits into tokens under a chain (numpy, and a
compiled numba kernel where numba is installed; both follow the same rules).

No web, metrics or model imports live here; the HTTP layer, the model runner and the benchmarks
all call this same API (DESIGN.md section 1)::

    chain = parse_chain([{"temperature": 0.8}, {"top_k": 50}, {"top_p": 0.9}], min_keep=1)
    out = pick(chain, logits, seed=7)          # tokens and per-row diagnostics
    probs = final_distribution(chain, logits)  # float64 [B, V], zero outside the kept set
"""

from service.sampling.chain import (
    METHODS,
    SCALAR_METHODS,
    TRUNCATION_METHODS,
    Chain,
    ChainError,
    OccurrencePenalty,
    RepetitionPenalty,
    Stage,
    parse_chain,
)
from service.sampling.core import (
    KERNEL_PROBLEM,
    KERNELS,
    InputError,
    Kernel,
    PickResult,
    StepPick,
    StepPicker,
    as_batch,
    final_distribution,
    fresh_seed,
    kernel_available,
    pick,
    warm_up,
)

__all__ = [
    "KERNELS",
    "KERNEL_PROBLEM",
    "METHODS",
    "SCALAR_METHODS",
    "TRUNCATION_METHODS",
    "Chain",
    "ChainError",
    "InputError",
    "Kernel",
    "OccurrencePenalty",
    "PickResult",
    "RepetitionPenalty",
    "Stage",
    "StepPick",
    "StepPicker",
    "as_batch",
    "final_distribution",
    "fresh_seed",
    "kernel_available",
    "parse_chain",
    "pick",
    "warm_up",
]
