"""Suite-wide settings.

Hypothesis runs under a fixed profile so that a failure reproduces: derandomized (the examples
are a function of the test alone, no random seed per run), examples printed on failure, and no
per-example deadline (a loaded CI machine must not turn a slow example into a failure).
Choose another profile with ``HYPOTHESIS_PROFILE=explore`` (random, more examples) when hunting
for new counterexamples by hand; its seed is printed with any failure.

``make test`` runs one pytest worker per core (pytest-xdist), so each test process keeps BLAS
at one thread, as leadline's own commands do (never more threads than cores).
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")  # before numpy loads here, and for every subprocess a test starts

import signal  # noqa: E402

# A shell's background job (`nohup ... &`, a CI runner) starts with SIGINT ignored, every process
# it starts inherits that, and Python then installs no KeyboardInterrupt handler: the tests that
# press Ctrl-C on a sweep they started need the disposition of an interactive session.
if signal.getsignal(signal.SIGINT) is signal.SIG_IGN:
    signal.signal(signal.SIGINT, signal.default_int_handler)

from hypothesis import HealthCheck, settings  # noqa: E402

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
