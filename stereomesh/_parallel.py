"""numba's parallel option for every kernel of the package: explicit ``prange`` loops only.

With ``parallel=True`` numba also turns every whole-array operation (``np.zeros``,
a slice assignment, an array expression) into a parallel region of its own, each
compiled as a separate function: about 0.3–0.5 s of compiling per region, a
quarter of a cold start, and a thread launch per region at run time (the SGM
solver met one on every row). The kernels' work is in their ``prange`` loops;
their whole-array operations are small.
"""

from __future__ import annotations


def prange_only() -> dict:
    """A fresh option dict (numba empties the dict it is given)."""
    return {"prange": True, "comprehension": False, "reduction": False, "inplace_binop": False,
            "setitem": False, "numpy": False, "stencil": False, "fusion": False}
