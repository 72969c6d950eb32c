"""stereomesh: stereo image pairs to clean, coloured, metric meshes.

Heavy subpackages (numba kernels, Open3D, PyMeshLab) load only when a function
that needs them is called, so ``import stereomesh`` and ``stereomesh --help``
stay fast.
"""

import os

# The disparity kernels start one parallel region per image row; OpenMP starts
# one in about a microsecond, numba's fallback work queue in about a hundred.
# Prefer it (a user's own setting wins).
os.environ.setdefault("NUMBA_THREADING_LAYER_PRIORITY", "omp tbb workqueue")

__version__ = "0.1.0"

__all__ = ["__version__"]
