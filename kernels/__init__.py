"""Pure numerics of leadline: no I/O, no Dask, no files.  One subpackage per subject.

- :mod:`.mixture`     the ensemble: mixture xi(x) = sum_q c_q^2 x^q (shared by every subject)
- :mod:`.exact`       the exact dense pass: contour, chunk plan, chunk kernels, p-step
                      iteration and gradient, the exactly computed angle range
- :mod:`.sparse`      the hypertree recursion for Max-q-XORSAT on D-regular hypergraphs
- :mod:`.optimize`    angles per depth: INTERP starts, restarts, L-BFGS-B, canonical angles
- :mod:`.extrapolate` fits of V_p* in 1/p and power laws, back-tests, headline and range
- :mod:`.reference`   ground state and algorithmic threshold of a mixture, shipped table
- :mod:`.finite_size` sampled and concrete instances, exact statevector QAOA (``transfer``)
- :mod:`.bath`        the bosonic-bath engine (one spin and Gaussian modes)

Rule: a subject imports another subject only through that subject's package
(``from leadline.kernels.exact import evaluate``), never one of its private ``_modules``.
"""
