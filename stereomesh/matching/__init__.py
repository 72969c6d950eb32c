"""The disparity engine: matching costs, MRF solvers, refinement and confidence.

Submodules load their numba kernels on first use; import the function you need
from its module (``from stereomesh.matching.disparity import compute_disparity``).
"""
