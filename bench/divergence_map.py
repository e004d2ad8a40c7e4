"""Benchmark: the divergence map over a fleet versus a loop of scipy's power_divergence.

For 1,000 count vectors with s = 20 cells and the default grid (alpha -1..3 step 0.25, beta
0..1 step 0.125: 153 members), time ``divergence_map`` over the whole fleet, and a Python loop
of ``scipy.stats.power_divergence`` for the beta = 0 column only (17 members per vector), in
the same run.  Reports seconds and the ratio of time per evaluated member (goal: >= 200x).
"""

from __future__ import annotations

import time

import numpy as np
from scipy import stats

from fitaudit.core.divergence import DEFAULT_ALPHAS, DEFAULT_BETAS, divergence_map


def _best_of(fn, repeat: int) -> float:
    best = np.inf
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def main(quick: bool = False) -> list[dict]:
    """Run the benchmark; return one result row."""
    n_vectors = 200 if quick else 1000
    s = 20
    rng = np.random.default_rng(7)
    counts = rng.multinomial(400, np.full(s, 1 / s), size=n_vectors).astype(float)
    probs = np.full(s, 1 / s)
    expected = 400 * probs

    def ours():
        divergence_map(counts, probs, DEFAULT_ALPHAS, DEFAULT_BETAS)

    def peer():
        for row in counts:
            for a in DEFAULT_ALPHAS:
                stats.power_divergence(row, expected, lambda_=a - 1.0)

    ours()  # warm-up
    t_ours = _best_of(ours, 5)
    t_peer = _best_of(peer, 1 if not quick else 2)
    members_ours = n_vectors * DEFAULT_ALPHAS.size * DEFAULT_BETAS.size
    members_peer = n_vectors * DEFAULT_ALPHAS.size
    per_ours = t_ours / members_ours
    per_peer = t_peer / members_peer
    row = {
        "benchmark": "divergence map (fleet) vs scipy power_divergence loop",
        "size": f"{n_vectors} vectors x {s} cells, {DEFAULT_ALPHAS.size}x{DEFAULT_BETAS.size} grid",
        "ours_s": t_ours,
        "peer_s": t_peer,
        "ours_us_per_member": per_ours * 1e6,
        "peer_us_per_member": per_peer * 1e6,
        "ratio": per_peer / per_ours,
        "goal": ">= 200x per member",
        "met": per_peer / per_ours >= 200,
    }
    return [row]


if __name__ == "__main__":
    import sys

    for r in main(quick="--quick" in sys.argv):
        print(
            f"{r['benchmark']}: {r['size']}\n"
            f"  fitaudit {r['ours_s']:.4f} s ({r['ours_us_per_member']:.3f} us/member); "
            f"scipy loop {r['peer_s']:.3f} s ({r['peer_us_per_member']:.2f} us/member); "
            f"ratio {r['ratio']:.0f}x per member (goal {r['goal']}: {'met' if r['met'] else 'NOT met'})"
        )
