"""A command-line look at the sampling core: several chains applied to one example step.

The example is one decoding step of a made-up stage direction, "The lantern gutters and the
understudy ...", over a twelve-word vocabulary with hand-set logits. For each chain the demo
prints what was kept, the final probabilities and the per-row diagnostics a caller receives.

    python -m service.demo [--seed N]
"""

from __future__ import annotations

import argparse
from typing import Any

import numpy as np

from service.sampling import final_distribution, parse_chain, pick

WORDS = [
    "exits", "freezes", "whispers", "bows", "stumbles", "laughs",
    "sings", "waits", "vanishes", "kneels", "shouts", "sleeps",
]  # fmt: skip
LOGITS = np.array([3.1, 2.9, 2.6, 1.8, 1.7, 1.2, 0.4, 0.3, -0.5, -0.9, -1.5, -2.8], np.float32)

CHAINS: dict[str, list[dict[str, Any]]] = {
    "as the model says": [{"temperature": 1.0}],
    "cooler": [{"temperature": 0.6}],
    "top_k 3": [{"top_k": 3}],
    "nucleus 0.8": [{"top_p": 0.8}],
    "typical 0.5": [{"typical": 0.5}],
    "min_p 0.3": [{"min_p": 0.3}],
    "eta 0.05": [{"eta": 0.05}],
    "no repeats": [{"repetition_penalty": {"factor": 3.0}}, {"top_k": 4}],
    "greedy": [{"greedy": True}],
}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="Apply example chains to one example step.")
    parser.add_argument("--seed", type=int, default=2024, help="seed for the draws")
    args = parser.parse_args(argv)
    print('Step: "The lantern gutters and the understudy ..."')
    print("history for the penalty: [exits, freezes] (ids 0 and 1)\n")
    for name, stages in CHAINS.items():
        chain = parse_chain(stages)
        history = [[0, 1]]
        dist = final_distribution(chain, LOGITS, history=history)[0]
        out = pick(chain, LOGITS, seed=args.seed, history=history)
        kept = "  ".join(f"{WORDS[i]} {dist[i]:.2f}" for i in np.argsort(-dist) if dist[i] > 0)
        print(f"{name:<18} {chain.to_spec()}")
        print(f"  kept     {kept}")
        print(
            f"  picked   {WORDS[out.tokens[0]]!r}  prob {out.prob[0]:.3f}  "
            f"logprob {out.logprob[0]:.3f}  entropy {out.entropy[0]:.3f} nats  "
            f"kept {out.kept[0]}  kept_mass {out.kept_mass[0]:.3f}  "
            f"fallback {out.fallback[0]}  seed {out.seed}\n"
        )
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
