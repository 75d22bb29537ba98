"""Benchmark: ground state to 1e-4 and algorithmic threshold to 1e-3 for a two-term mixture.

Targets: GS < 30 s, ALG < 2 min on one core.  ``run()`` returns the figures as a dict.
"""

from __future__ import annotations

import json
import os

from leadline.kernels.reference import algorithmic_threshold, ground_state

MIXTURE = "2:0.5,4:0.25"


def run(mixture: str = MIXTURE) -> dict:
    gs = ground_state(mixture, tol=1e-4)
    alg = algorithmic_threshold(mixture, tol=1e-3)
    return {
        "benchmark": "reference energies",
        "xi": mixture,
        "cpu_threads_hint": os.environ.get("OMP_NUM_THREADS", "unset"),
        "ground_state": gs.value,
        "ground_state_uncertainty": gs.uncertainty,
        "ground_state_steps": gs.steps,
        "ground_state_k_sequence": gs.k_sequence,
        "ground_state_seconds": gs.wall_time,
        "ground_state_target_seconds": 30.0,
        "algorithmic_threshold": alg.value,
        "algorithmic_threshold_uncertainty": alg.uncertainty,
        "algorithmic_threshold_steps": alg.steps,
        "algorithmic_threshold_k_sequence": alg.k_sequence,
        "algorithmic_threshold_seconds": alg.wall_time,
        "algorithmic_threshold_target_seconds": 120.0,
    }


if __name__ == "__main__":
    os.environ.setdefault("OMP_NUM_THREADS", "1")
    result = run()
    print(json.dumps(result, indent=1))
    print(
        f"GS  {result['ground_state']:.6f} +- {result['ground_state_uncertainty']:.1e}  "
        f"k = {result['ground_state_steps']}  {result['ground_state_seconds']:.1f} s (target 30 s)"
    )
    print(
        f"ALG {result['algorithmic_threshold']:.6f} +- {result['algorithmic_threshold_uncertainty']:.1e}  "
        f"k = {result['algorithmic_threshold_steps']}  {result['algorithmic_threshold_seconds']:.1f} s (target 120 s)"
    )
