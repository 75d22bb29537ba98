"""leadline: exact infinite-size QAOA energies for mixed-spin glasses.

The import name's four layers live in the repository's top-level folders
(``kernels/``, ``storage/``, ``cluster/``, ``jobs/``) and are mapped onto
``leadline.kernels`` and friends by ``pyproject.toml``.
"""

__version__ = "0.1.0"
