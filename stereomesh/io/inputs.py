"""Readers of stereo inputs: every kind of input becomes one :class:`StereoPair`.

A reader takes the input paths and the calibration path and returns the
rectified pair the core works on. Readers are registered by layout name in
:data:`READERS`; :func:`read_stereo_input` picks one. Today: two image files
with a rectified calibration (``pair``). Single-file stereo photographs and
side-by-side scans register here as they arrive.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from pathlib import Path

from stereomesh.errors import InputError


def read_two_files(inputs: Sequence[Path], calib: Path | None, *, swap: bool = False):
    """Two image files (left, right) and a rectified calibration JSON.

    Parameters
    ----------
    inputs : sequence of two Path
        Left and right image files (8- or 16-bit, grey or colour).
    calib : Path
        Calibration JSON in the rectified form (see :mod:`stereomesh.io.calibration`).
    swap : bool
        The first file is the right image.

    Returns
    -------
    StereoPair
    """
    from stereomesh.io.calibration import check_image_size, read_calibration
    from stereomesh.io.images import read_pair
    from stereomesh.pipeline import StereoPair

    if len(inputs) != 2:
        raise InputError(
            f"give two image files (LEFT RIGHT), got {len(inputs)}; single stereo files "
            "are not supported yet"
        )
    if calib is None:
        raise InputError("--calib CALIB.json is required (the uncalibrated path is not built yet)")
    left_path, right_path = (inputs[1], inputs[0]) if swap else (inputs[0], inputs[1])
    left, right = read_pair(left_path, right_path)
    rig = read_calibration(calib)
    check_image_size(rig, left.shape[1], left.shape[0], calib, left_path)
    return StereoPair(left, right, rig, [Path(left_path), Path(right_path), Path(calib)],
                      info={"layout": "pair", "rectification": "given"})


READERS: dict[str, Callable] = {
    "pair": read_two_files,
}
"""Readers by layout name: ``reader(inputs, calib, *, swap) -> StereoPair``."""


def read_stereo_input(
    inputs: Sequence[str | Path],
    calib: str | Path | None = None,
    *,
    layout: str = "pair",
    swap: bool = False,
):
    """Read any supported stereo input into a :class:`~stereomesh.pipeline.StereoPair`.

    Parameters
    ----------
    inputs : sequence of str or Path
        The input files (two images for ``layout="pair"``).
    calib : str or Path, optional
        Calibration file.
    layout : str
        A key of :data:`READERS`.
    swap : bool
        Left and right are the other way round.

    Returns
    -------
    StereoPair

    Raises
    ------
    InputError
        Missing or unreadable files, a calibration that does not fit, an
        unknown layout.

    Examples
    --------
    >>> from pathlib import Path
    >>> demo = Path(__file__).resolve().parents[2] / "demo_data"
    >>> pair = read_stereo_input([demo / "left.png", demo / "right.png"], demo / "calib.json")
    >>> pair.left.shape, pair.rig.metric
    ((480, 640, 3), True)
    """
    if layout not in READERS:
        raise InputError(f"unknown layout {layout!r}; known: {', '.join(READERS)}")
    paths = [Path(p) for p in inputs]
    return READERS[layout](paths, None if calib is None else Path(calib), swap=swap)
