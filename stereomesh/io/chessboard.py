"""``stereomesh calibrate``: chessboard image pairs in, full calibration JSON and report out."""

from __future__ import annotations

import glob
import json
from pathlib import Path

from stereomesh.errors import InputError


def calibrate_from_files(left_glob: str, right_glob: str, pattern: str, square: float,
                         out_dir: str | Path) -> dict:
    """Find the board in every pair, calibrate, write ``calibration.json`` and ``report.json``.

    Pairs are the sorted matches of the two globs, taken in order. Pairs where
    the board was not found in both views are listed in the report, not fatal.

    Returns
    -------
    dict
        The report as written.
    """
    import time

    from stereomesh import __version__
    from stereomesh.calibrate import calibrate_stereo, find_board, parse_pattern
    from stereomesh.io.atomic import write_text_atomic
    from stereomesh.io.calibration import calibration_to_dict
    from stereomesh.io.images import read_image
    from stereomesh.jobs import prepare_out_dir
    from stereomesh.rectify import grey8
    from stereomesh.report import CAUTION, input_records, jsonable

    t0 = time.perf_counter()
    try:
        cols_rows = parse_pattern(pattern)
    except ValueError as exc:
        raise InputError(f"--pattern: {exc}") from None
    if not square > 0:
        raise InputError(f"--square must be the side of a square in metres, got {square}")
    lefts, rights = sorted(glob.glob(left_glob)), sorted(glob.glob(right_glob))
    if not lefts or not rights:
        raise InputError(f"--left {left_glob!r} matched {len(lefts)} file(s), --right "
                         f"{right_glob!r} {len(rights)}; quote the patterns and check them")
    if len(lefts) != len(rights):
        raise InputError(f"--left matched {len(lefts)} files but --right {len(rights)}; "
                         "give the same number of left and right images, in the same order")
    out_dir = prepare_out_dir(out_dir)
    size = None
    used, left_corners, right_corners, not_found = [], [], [], []
    for lp, rp in zip(lefts, rights, strict=True):
        left, right = read_image(lp), read_image(rp)
        this = (left.shape[1], left.shape[0])
        if right.shape[:2] != left.shape[:2] or (size is not None and this != size):
            raise InputError(f"{rp}: all calibration images must have one size "
                             f"({size or this}); got {right.shape[1]}x{right.shape[0]}")
        size = this
        a, b = find_board(grey8(left), cols_rows), find_board(grey8(right), cols_rows)
        if a is None or b is None:
            missing = [s for s, c in (("left", a), ("right", b)) if c is None]
            not_found.append({"left": lp, "right": rp, "not_found_in": missing})
            continue
        used.append((lp, rp))
        left_corners.append(a)
        right_corners.append(b)
    try:
        cal, figures = calibrate_stereo(left_corners, right_corners, cols_rows, square, size)
    except ValueError as exc:
        raise InputError(f"{exc}; check --pattern (inner corners, COLSxROWS)") from None
    for (lp, rp), entry in zip(used, figures["per_image"], strict=True):
        entry.update(left=lp, right=rp)
    calib_path = out_dir / "calibration.json"
    write_text_atomic(calib_path, json.dumps(calibration_to_dict(cal), indent=2) + "\n")
    report = {"version": __version__, "command": "calibrate", "status": "ok",
              "inputs": input_records([Path(p) for p in (*lefts, *rights)]),
              "params": {"pattern": f"{cols_rows[0]}x{cols_rows[1]}", "square_m": square},
              "image_size": list(size), **figures, "not_found": not_found,
              "outputs": {"calibration": str(calib_path)},
              "warnings": ([f"the board was not found in {len(not_found)} pair(s)"]
                           if not_found else []),
              "total_seconds": round(time.perf_counter() - t0, 3), "caution": CAUTION}
    if figures["rms_px"] > 1.0:
        report["warnings"].append(f"overall RMS reprojection error {figures['rms_px']:.2f} px "
                                  "is high; check the square size, sharpness and board flatness")
    write_text_atomic(out_dir / "report.json", json.dumps(jsonable(report), indent=2) + "\n")
    return report
