"""stereomesh: stereo image pairs to clean, coloured, metric meshes.

Heavy subpackages (numba kernels, Open3D, PyMeshLab) load only when a function
that needs them is called, so ``import stereomesh`` and ``stereomesh --help``
stay fast.
"""

__version__ = "0.1.0"

__all__ = ["__version__"]
