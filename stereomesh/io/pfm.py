"""PFM (portable float map) files, through OpenCV, written atomically."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from stereomesh.errors import InputError


def write_pfm(path: str | Path, array: np.ndarray) -> None:
    """Write a 2-D float32 map (NaN allowed) as PFM, rows top to bottom.

    Examples
    --------
    >>> import numpy as np, tempfile, pathlib
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "d.pfm"
    >>> write_pfm(p, np.array([[1.5, np.nan]], np.float32))
    >>> read_pfm(p)
    array([[1.5, nan]], dtype=float32)
    """
    import cv2

    from stereomesh.io.atomic import atomic_path

    array = np.ascontiguousarray(array, np.float32)
    if array.ndim != 2:
        raise ValueError(f"PFM maps here are single-channel, got shape {array.shape}")
    with atomic_path(path) as tmp:
        if not cv2.imwrite(str(tmp), array):
            raise OSError(f"{path}: OpenCV could not write the PFM file")


def read_pfm(path: str | Path) -> np.ndarray:
    """Read a single-channel PFM file as float32, rows top to bottom."""
    import cv2

    path = Path(path)
    if not path.is_file():
        raise InputError(f"{path}: PFM file not found")
    arr = cv2.imread(str(path), cv2.IMREAD_UNCHANGED)
    if arr is None:
        raise InputError(f"{path}: not a readable PFM file")
    if arr.ndim == 3:
        arr = arr[..., 0]
    return np.ascontiguousarray(arr, np.float32)
