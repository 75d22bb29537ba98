"""The commands of `leadline`, one module per command (or per family of commands).

Each module parses and validates its options, calls the machinery beside this package in
``leadline.jobs`` (``api``, ``sweep``, ``spec``, ``report``, ``parsing``, ``paths``, ...),
and prints; it exposes ``register(app)``, and ``jobs/cli.py`` lists the modules.  No other
module of the tool imports a command module (tests may).

- ``evaluate``: V_p(gamma, beta) of a mixture (exact, or ``--method bath`` through the
  private ``_evaluate_bath``) or of a sparse ensemble (``--sparse-q``, through ``_sparse``);
- ``optimize``: optimal angles and V_p* at one depth (dense, or sparse through ``_sparse``);
- ``reference``: ground-state energy and algorithmic threshold of a mixture or of a store;
- ``finite_size``: statevector averages at finite n next to the exact V_p;
- ``sweep``: ``sweep``, ``resume`` and ``status`` of a study store;
- ``table`` and ``plot``: depth tables and figures of a study;
- ``transfer``: ensemble-optimal angles carried to a concrete instance.

Start-up rule: dask, distributed, zarr, matplotlib and scipy.optimize are imported inside
the commands that use them, never at module level (tests/test_startup.py).
"""
