"""Readers of stereo inputs: every kind of input becomes one :class:`StereoPair`.

A reader takes the input paths and the calibration path and returns the
rectified pair the core works on. Readers are registered by layout name in
:data:`READERS`; :func:`read_stereo_input` picks one: two image files
(``pair``), one MPO file (``mpo``), one scanned stereo card
(``side-by-side``). Each hands its two original images to
:func:`pair_from_images`, which rectifies them as the calibration says.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from pathlib import Path

from stereomesh.errors import InputError


def exif_focal_px(path: Path, width: int) -> float | None:
    """Focal length in pixels from a photo's EXIF, or None when it does not say.

    From ``FocalLengthIn35mmFilm`` (a 36 mm wide frame) or from ``FocalLength``
    with ``FocalPlaneXResolution`` and its unit (EXIF 2.3 tags 0xA405, 0x920A,
    0xA20E, 0xA210); the focal-plane resolution is taken to describe an image of
    ``width`` pixels as the camera saved it.
    """
    from PIL import Image, UnidentifiedImageError

    try:
        with Image.open(path) as im:
            # A PNG's EXIF may follow the pixels, and looking for it there decodes
            # the whole image; camera photos are JPEG, whose EXIF comes first.
            if im.format == "PNG" and "exif" not in im.info:
                return None
            exif = im.getexif().get_ifd(0x8769)
            full_width = im.size[0]
    except (UnidentifiedImageError, OSError):
        return None
    try:
        f35 = float(exif.get(0xA405, 0) or 0)
        if f35 > 0:
            return f35 / 36.0 * width
        f_mm = float(exif.get(0x920A, 0) or 0)
        res = float(exif.get(0xA20E, 0) or 0)
        unit = {2: 25.4, 3: 10.0, 4: 1.0}.get(int(exif.get(0xA210, 2)), 25.4)
        if f_mm > 0 and res > 0:
            return f_mm * res / unit * width / full_width
    except (TypeError, ValueError, ZeroDivisionError):
        return None
    return None


def pair_from_images(left, right, calib: Path | None, sources: list[Path], info: dict,
                     warnings: list[str] | None = None, *, focal_px: float | None = None):
    """Make the rectified :class:`StereoPair` of two original images and a calibration.

    A rectified calibration is used as given; a full one is rectified with
    OpenCV (:func:`stereomesh.rectify.stereo_rectification`), and the residual
    rows of verified feature matches go into ``info["rectification"]``. With no
    calibration the pair rectifies itself from feature matches
    (:func:`stereomesh.rectify.uncalibrated_rectification`; ``focal_px`` from
    EXIF helps when the pair does not fix the focal length) and is unscaled.
    """
    from stereomesh.io.calibration import check_image_size, load_calibration
    from stereomesh.pipeline import StereoPair
    from stereomesh.rectify import (
        RectifiedRig,
        apply_rectification,
        match_residual_figures,
        stereo_rectification,
    )

    warnings = list(warnings or [])
    if calib is None:
        return _uncalibrated_pair(left, right, sources, info, warnings, focal_px)
    cal = load_calibration(calib)
    h, w = left.shape[:2]
    if isinstance(cal, RectifiedRig):
        check_image_size(cal, w, h, calib, sources[0])
        return StereoPair(left, right, cal, [*sources, Path(calib)],
                          info={**info, "rectification": {"method": "given"}},
                          warnings=warnings)
    if tuple(cal.image_size) != (w, h):
        raise InputError(f"{calib}: calibrated for {cal.image_size[0]}x{cal.image_size[1]} but "
                         f"{sources[0]} is {w}x{h}; use the calibration of this camera")
    try:
        rect = stereo_rectification(cal)
    except ValueError as exc:
        raise InputError(f"{calib}: {exc}") from None
    if focal_px and abs(focal_px / cal.K1[0, 0] - 1) > 0.05:
        warnings.append(f"the EXIF focal length ({focal_px:.0f} px) differs from the "
                        f"calibration's ({cal.K1[0, 0]:.0f} px) by more than 5 %: check that "
                        "the calibration is for this camera and zoom setting")
    rl, rr = apply_rectification(rect, left, right)
    figures = {"method": "calibrated", "focal_px": round(rect.rig.focal_px, 3),
               "baseline": rect.rig.baseline,
               "vertical_residual": match_residual_figures(rect, left, right)}
    return StereoPair(rl, rr, rect.rig, [*sources, Path(calib)],
                      info={**info, "rectification": figures}, warnings=warnings,
                      rectification=rect)


def _uncalibrated_pair(left, right, sources, info, warnings, focal_px):
    from stereomesh.pipeline import StereoPair
    from stereomesh.rectify import apply_rectification, grey8, uncalibrated_rectification

    try:
        rect, figures = uncalibrated_rectification(grey8(left), grey8(right),
                                                   focal_px=focal_px)
    except ValueError as exc:
        raise InputError(f"{sources[0]}: the pair cannot be rectified without a calibration: "
                         f"{exc}; give --calib") from None
    if figures["swapped"]:
        left, right = right, left
        warnings.append("the disparity signs say the views are swapped (the one read as left "
                        "was taken from the right); they were used the other way round: "
                        "check the order of the files or --swap")
    warnings.append("no calibration: the pair was rectified from its own feature matches "
                    f"with a focal length of {figures['focal_px']:.0f} px "
                    f"({figures['focal_source']}); the shape is approximate and unscaled")
    rl, rr = apply_rectification(rect, left, right)
    return StereoPair(rl, rr, rect.rig, list(sources), info={**info, "rectification": figures},
                      warnings=warnings, rectification=rect)


def read_two_files(inputs: Sequence[Path], calib: Path | None, *, swap: bool = False):
    """Two image files (left, right) and a calibration (rectified or full form).

    Parameters
    ----------
    inputs : sequence of two Path
        Left and right image files (8- or 16-bit, grey or colour).
    calib : Path
        Calibration file (see :mod:`stereomesh.io.calibration`).
    swap : bool
        The first file is the right image.

    Returns
    -------
    StereoPair
    """
    from stereomesh.io.images import read_pair

    if len(inputs) != 2:
        raise InputError(
            f"give two image files (LEFT RIGHT), got {len(inputs)}; for one file give an "
            "MPO file or --layout side-by-side"
        )
    left_path, right_path = (inputs[1], inputs[0]) if swap else (inputs[0], inputs[1])
    left, right = read_pair(left_path, right_path)
    return pair_from_images(left, right, calib, [Path(left_path), Path(right_path)],
                            {"layout": "pair"},
                            focal_px=exif_focal_px(left_path, left.shape[1]))


def read_mpo_frames(path: Path) -> list:
    """The frames of a Multi-Picture Format file (CIPA DC-007) as RGB arrays.

    Pillow opens MPO files and steps through their images with ``seek``.
    """
    import numpy as np
    from PIL import Image, UnidentifiedImageError

    if not path.is_file():
        raise InputError(f"{path}: file not found; check the path")
    try:
        with Image.open(path) as im:
            frames = []
            for index in range(getattr(im, "n_frames", 1)):
                im.seek(index)
                frames.append(np.array(im.convert("RGB")))
    except (UnidentifiedImageError, OSError) as exc:
        raise InputError(f"{path}: not a readable MPO/JPEG file ({exc})") from None
    return frames


def read_mpo(inputs: Sequence[Path], calib: Path | None, *, swap: bool = False):
    """One MPO file from a stereo camera: its first two frames are left and right.

    Parameters
    ----------
    inputs : sequence of one Path
        The ``.mpo`` file.
    calib : Path or None
        Calibration of the camera (either form).
    swap : bool
        The first frame is the right view.

    Returns
    -------
    StereoPair
    """
    if len(inputs) != 1:
        raise InputError(f"layout mpo takes one file, got {len(inputs)}")
    path = inputs[0]
    frames = read_mpo_frames(path)
    if len(frames) < 2:
        raise InputError(f"{path}: holds {len(frames)} image; a stereo MPO file holds two "
                         "(left first); give two image files instead")
    left, right = (frames[1], frames[0]) if swap else (frames[0], frames[1])
    if left.shape != right.shape:
        raise InputError(f"{path}: its two images differ in size ({left.shape[1]}x"
                         f"{left.shape[0]} and {right.shape[1]}x{right.shape[0]})")
    return pair_from_images(left, right, calib, [Path(path)],
                            {"layout": "mpo", "frames": len(frames)},
                            focal_px=exif_focal_px(path, left.shape[1]))


def read_side_by_side(inputs: Sequence[Path], calib: Path | None, *, swap: bool = False):
    """One scanned side-by-side stereo card (see :mod:`stereomesh.io.side_by_side`).

    Each half is cropped to its print on its own and the right brought to the
    left's scale; a scan's EXIF describes the scanner, so it is not read. With
    no calibration (the usual case) the pair rectifies itself from its matches.

    Parameters
    ----------
    inputs : sequence of one Path
    calib : Path or None
        A calibration of the cropped views, rarely known for a card.
    swap : bool
        The left view is on the right (cross-eyed order).

    Returns
    -------
    StereoPair
    """
    from stereomesh.io.images import read_image
    from stereomesh.io.side_by_side import split_card

    if len(inputs) != 1:
        raise InputError(f"layout side-by-side takes one scan, got {len(inputs)} files")
    path = inputs[0]
    scan = read_image(path)
    try:
        left, right, figures = split_card(scan, swap=swap)
    except InputError as exc:
        raise InputError(f"{path}: {exc}; crop the scan to the card, or give the two "
                         "views as two files") from None
    return pair_from_images(left, right, calib, [Path(path)],
                            {"layout": "side-by-side", "swap": swap, "card": figures})


READERS: dict[str, Callable] = {
    "pair": read_two_files,
    "mpo": read_mpo,
    "side-by-side": read_side_by_side,
}
"""Readers by layout name: ``reader(inputs, calib, *, swap) -> StereoPair``."""


def read_stereo_input(
    inputs: Sequence[str | Path],
    calib: str | Path | None = None,
    *,
    layout: str | None = "pair",
    swap: bool = False,
):
    """Read any supported stereo input into a :class:`~stereomesh.pipeline.StereoPair`.

    Parameters
    ----------
    inputs : sequence of str or Path
        The input files (two images for ``layout="pair"``).
    calib : str or Path, optional
        Calibration file.
    layout : str or None
        A key of :data:`READERS`; a single ``.mpo`` file given as ``"pair"`` (or
        None) is read as ``"mpo"``.
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
    paths = [Path(p) for p in inputs]
    if layout in (None, "pair") and len(paths) == 1 and paths[0].suffix.lower() == ".mpo":
        layout = "mpo"
    layout = layout or "pair"
    if layout not in READERS:
        raise InputError(f"unknown layout {layout!r}; known: {', '.join(READERS)}")
    return READERS[layout](paths, None if calib is None else Path(calib), swap=swap)
