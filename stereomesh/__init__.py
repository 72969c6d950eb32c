"""stereomesh: stereo image pairs to clean, coloured, metric meshes.

Heavy subpackages (numba kernels, Open3D, PyMeshLab) load only when a function
that needs them is called, so ``import stereomesh`` and ``stereomesh --help``
stay fast. Importing the package changes no process-wide setting; the command
line sets its own (see :func:`stereomesh.cli.configure_process`).

The in-memory core is :func:`stereomesh.pipeline.reconstruct`; readers are in
:mod:`stereomesh.io.inputs`, the disparity engine alone is
:func:`stereomesh.matching.disparity.compute_disparity`.
"""

__version__ = "0.1.0"

CAUTION = (
    "Stereo-derived geometry is an estimate: every point carries a stated depth "
    "uncertainty (sigma_z). For structural, legal or survey use, defer to licensed "
    "surveyors and local codes."
)
"""The caution shown wherever output could be taken for a measurement."""

__all__ = ["CAUTION", "__version__"]
