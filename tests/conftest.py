"""Suite-wide settings.

Hypothesis runs under a fixed profile so that a failure reproduces: derandomized (the examples
are a function of the test alone, no random seed per run), examples printed on failure, and no
per-example deadline (a loaded CI machine must not turn a slow example into a failure).
Choose another profile with ``HYPOTHESIS_PROFILE=explore`` (random, more examples) when hunting
for new counterexamples by hand; its seed is printed with any failure.
"""

from __future__ import annotations

import os

from hypothesis import HealthCheck, settings

settings.register_profile(
    "ci",
    derandomize=True,
    deadline=None,
    print_blob=True,
    database=None,
    suppress_health_check=[HealthCheck.too_slow],
)
settings.register_profile("explore", deadline=None, print_blob=True, max_examples=200)
settings.load_profile(os.environ.get("HYPOTHESIS_PROFILE", "ci"))
