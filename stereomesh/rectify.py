"""Rectified stereo geometry.

Pre-rectified pairs give a :class:`RectifiedRig` directly; calibrated (K, distortion,
R, T) rigs are rectified with OpenCV (:func:`stereo_rectification`) into the same
:class:`RectifiedRig`, so every later stage works on one description of the
rectified pair. The functions here work on arrays; reading files is in
:mod:`stereomesh.io`.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np


@dataclass(frozen=True)
class RectifiedRig:
    """Intrinsics of a rectified stereo pair, in the left rectified camera.

    Parameters
    ----------
    focal_px : float
        Focal length in pixels (same for both rectified images).
    cx, cy : float
        Principal point of the left rectified image, pixels.
    baseline : float
        Distance between the camera centres, in ``units`` (metres by default).
        The right camera sits at ``+baseline`` along x of the left camera.
    doffs : float
        Difference of the principal points, ``cx_right - cx_left`` in pixels, so
        that depth is ``Z = focal_px * baseline / (d + doffs)``.
    image_size : tuple of int
        ``(width, height)`` of the rectified images, pixels.
    units : str
        Unit of ``baseline`` and of every length derived from it.
    metric : bool
        False when the baseline is nominal (scale unknown).
    baseline_std, focal_std_px : float or None
        One-sigma uncertainty of the baseline (in ``units``) and of the focal
        length (pixels) when the calibration states them; they set the scale
        uncertainty in the report (``report.accuracy_statement``).
    """

    focal_px: float
    cx: float
    cy: float
    baseline: float
    doffs: float = 0.0
    image_size: tuple[int, int] = (0, 0)
    units: str = "m"
    metric: bool = True
    baseline_std: float | None = None
    focal_std_px: float | None = None

    @property
    def Q(self) -> np.ndarray:  # noqa: N802  (OpenCV's name for this matrix)
        """4×4 reprojection matrix in OpenCV's convention.

        ``[X Y Z W]^T = Q [x y d 1]^T`` as ``cv2.stereoRectify`` returns it for a
        horizontal rig whose right camera is at ``+baseline`` (OpenCV writes
        ``Tx = -baseline``).
        """
        f, b = self.focal_px, self.baseline
        return np.array(
            [
                [1.0, 0.0, 0.0, -self.cx],
                [0.0, 1.0, 0.0, -self.cy],
                [0.0, 0.0, 0.0, f],
                [0.0, 0.0, 1.0 / b, self.doffs / b],
            ]
        )

    def depth_from_disparity(self, disparity: np.ndarray) -> np.ndarray:
        """Depth ``Z = f·B / (d + doffs)`` in ``units``; NaN where ``d`` is NaN."""
        d = np.asarray(disparity, dtype=np.float64)
        with np.errstate(divide="ignore", invalid="ignore"):
            z = self.focal_px * self.baseline / (d + self.doffs)
        z[~np.isfinite(z) | (z <= 0)] = np.nan
        return z

    def to_dict(self) -> dict:
        """The rectified calibration JSON form fixed in the design."""
        out = asdict(self)
        out["image_size"] = list(self.image_size)
        out["rectified"] = True
        out.pop("metric")
        for key in ("baseline_std", "focal_std_px"):
            if out[key] is None:
                out.pop(key)
        return out


@dataclass(frozen=True)
class StereoCalibration:
    """Full calibration of a stereo rig, in OpenCV's conventions.

    Parameters
    ----------
    K1, K2 : (3, 3) float64 arrays
        Intrinsic matrices of the left and right cameras, pixels.
    dist1, dist2 : (N,) float64 arrays
        Distortion coefficients in OpenCV's order ``k1 k2 p1 p2 [k3 [k4 k5 k6]]``
        (empty or zeros for none).
    R : (3, 3) float64 array
        Rotation taking left-camera coordinates to right-camera coordinates.
    T : (3,) float64 array
        Translation of the same transform, ``X_right = R X_left + T``, in metres
        (or nominal units when ``metric`` is False). For a right camera at
        ``+B`` along the left camera's x axis, ``T = (-B, 0, 0)``, as
        ``cv2.stereoCalibrate`` returns it.
    image_size : tuple of int
        ``(width, height)`` of the images the calibration is for.
    metric : bool
        False when ``T`` has a nominal length (scale unknown).
    """

    K1: np.ndarray
    dist1: np.ndarray
    K2: np.ndarray
    dist2: np.ndarray
    R: np.ndarray
    T: np.ndarray
    image_size: tuple[int, int]
    metric: bool = True


@dataclass(frozen=True)
class Rectification:
    """Rectifying transforms of a calibrated pair and the maps that apply them.

    Attributes
    ----------
    calibration : StereoCalibration
        What was rectified.
    R1, R2 : (3, 3) float64 arrays
        Rotations of the left and right cameras into the rectified frame.
    P1, P2 : (3, 4) float64 arrays
        Projection matrices of the rectified cameras (``cv2.stereoRectify``).
    maps : tuple of four (H, W) float32 arrays
        ``(left_x, left_y, right_x, right_y)``: for each rectified pixel, the
        pixel of the original image it samples (for ``cv2.remap``), so every
        rectified pixel traces back to the original images.
    rig : RectifiedRig
        The rectified geometry the later stages use.
    """

    calibration: StereoCalibration
    R1: np.ndarray
    R2: np.ndarray
    P1: np.ndarray
    P2: np.ndarray
    maps: tuple
    rig: RectifiedRig

    def rectify_points(self, points: np.ndarray, side: str = "left") -> np.ndarray:
        """Positions in the rectified image of points of an original image.

        Parameters
        ----------
        points : (N, 2) float array
            Pixels ``(u, v)`` of the original left (or right) image.
        side : {"left", "right"}

        Returns
        -------
        (N, 2) float64 array
        """
        import cv2

        c = self.calibration
        K, d, Rr, P = ((c.K1, c.dist1, self.R1, self.P1) if side == "left"
                       else (c.K2, c.dist2, self.R2, self.P2))
        pts = np.asarray(points, np.float64).reshape(-1, 1, 2)
        return cv2.undistortPoints(pts, K, d, R=Rr, P=P).reshape(-1, 2)


def _rig_from_projections(P1: np.ndarray, P2: np.ndarray, size, metric: bool) -> RectifiedRig:
    """The rectified rig read off OpenCV's projection matrices.

    ``P2[0, 3] = -f B`` for a right camera at ``+B`` (OpenCV writes ``Tx f``
    with ``Tx = -B``), so the baseline is ``-P2[0, 3] / P2[0, 0]``.
    """
    f = float(P1[0, 0])
    baseline = -float(P2[0, 3]) / float(P2[0, 0])
    return RectifiedRig(focal_px=f, cx=float(P1[0, 2]), cy=float(P1[1, 2]), baseline=baseline,
                        doffs=float(P2[0, 2] - P1[0, 2]), image_size=(int(size[0]), int(size[1])),
                        units="m" if metric else "unscaled", metric=metric)


def stereo_rectification(calibration: StereoCalibration, *, alpha: float = 0.0) -> Rectification:
    """Rectifying rotations, projections and remap tables of a calibrated rig.

    Uses ``cv2.stereoRectify`` (with ``CALIB_ZERO_DISPARITY``, so the two
    rectified principal points coincide and ``doffs`` is 0) and
    ``cv2.initUndistortRectifyMap``. The rectified images keep the input size.

    Parameters
    ----------
    calibration : StereoCalibration
    alpha : float
        0 keeps only pixels both originals cover (no black borders), 1 keeps
        every original pixel (OpenCV's free scaling parameter).

    Returns
    -------
    Rectification

    Raises
    ------
    ValueError
        When the rig is not side by side (the right camera is not to the right,
        or it sits mostly in front or behind, so rows cannot be made epipolar).

    Examples
    --------
    >>> import numpy as np
    >>> K = np.array([[500.0, 0, 160], [0, 500, 120], [0, 0, 1]])
    >>> cal = StereoCalibration(K, np.zeros(5), K, np.zeros(5), np.eye(3),
    ...                         np.array([-0.1, 0, 0]), (320, 240))
    >>> rect = stereo_rectification(cal)
    >>> round(rect.rig.baseline, 3), rect.maps[0].shape
    (0.1, (240, 320))
    """
    import cv2

    c = calibration
    T = np.asarray(c.T, np.float64).reshape(3)
    if T[0] >= 0 or abs(T[0]) < 0.5 * np.linalg.norm(T):
        raise ValueError(
            f"the right camera is not beside the left one on its +x side (T = {T.round(4)}); "
            "check the order of the images (swap them) or the sign convention of T"
        )
    size = (int(c.image_size[0]), int(c.image_size[1]))
    R1, R2, P1, P2, _q, _roi1, _roi2 = cv2.stereoRectify(
        c.K1, c.dist1, c.K2, c.dist2, size, c.R, T.reshape(3, 1), flags=cv2.CALIB_ZERO_DISPARITY,
        alpha=alpha, newImageSize=size)
    maps = []
    for K, d, Rr, P in ((c.K1, c.dist1, R1, P1), (c.K2, c.dist2, R2, P2)):
        mx, my = cv2.initUndistortRectifyMap(K, d, Rr, P, size, cv2.CV_32FC1)
        maps += [mx, my]
    rig = _rig_from_projections(P1, P2, size, c.metric)
    return Rectification(c, R1, R2, P1, P2, tuple(maps), rig)


def apply_rectification(rect: Rectification, left: np.ndarray, right: np.ndarray):
    """Resample both original images onto the rectified grid (bilinear, ``cv2.remap``).

    Parameters
    ----------
    rect : Rectification
    left, right : (H, W, 3) uint8 or uint16 arrays
        Original images of the calibrated size.

    Returns
    -------
    (H, W, 3) array, (H, W, 3) array
        The rectified left and right images, same dtype; pixels with no source
        are black.
    """
    import cv2

    mlx, mly, mrx, mry = rect.maps
    out_l = cv2.remap(left, mlx, mly, cv2.INTER_LINEAR, borderMode=cv2.BORDER_CONSTANT)
    out_r = cv2.remap(right, mrx, mry, cv2.INTER_LINEAR, borderMode=cv2.BORDER_CONSTANT)
    return out_l, out_r


def vertical_residuals(rect: Rectification, left_points: np.ndarray,
                       right_points: np.ndarray) -> np.ndarray:
    """Row difference of matched points after rectification, pixels.

    Parameters
    ----------
    rect : Rectification
    left_points, right_points : (N, 2) float arrays
        Matching pixels of the original left and right images.

    Returns
    -------
    (N,) float64 array
        ``v_right - v_left`` on the rectified grid (0 for a perfect rig).
    """
    lp = rect.rectify_points(left_points, "left")
    rp = rect.rectify_points(right_points, "right")
    return rp[:, 1] - lp[:, 1]


def residual_figures(residuals: np.ndarray) -> dict:
    """Median, 95th percentile and maximum of absolute vertical residuals, pixels."""
    r = np.abs(np.asarray(residuals, np.float64))
    if r.size == 0:
        return {"matches": 0}
    return {"matches": int(r.size), "median_px": round(float(np.median(r)), 4),
            "p95_px": round(float(np.percentile(r, 95)), 4), "max_px": round(float(r.max()), 4)}


def grey8(image: np.ndarray) -> np.ndarray:
    """An RGB or grey image (uint8 or uint16) as 8-bit grey, for feature detection.

    Examples
    --------
    >>> grey8(np.full((2, 3, 3), 65535, np.uint16)).max()
    np.uint8(255)
    """
    import cv2

    img = np.asarray(image)
    if img.dtype == np.uint16:
        img = (img >> 8).astype(np.uint8)
    if img.ndim == 3:
        img = cv2.cvtColor(np.ascontiguousarray(img), cv2.COLOR_RGB2GRAY)
    return np.ascontiguousarray(img, np.uint8)


def feature_matches(left: np.ndarray, right: np.ndarray, *, ratio: float = 0.75,
                    features: int = 6000) -> tuple[np.ndarray, np.ndarray]:
    """Matched points of two grey images: SIFT with Lowe's ratio test, mutual best.

    Parameters
    ----------
    left, right : (H, W) uint8 arrays
    ratio : float
        A match is kept when its descriptor distance is below ``ratio`` times
        the second best's (Lowe 2004).
    features : int
        Most features detected per image.

    Returns
    -------
    (N, 2) float64 array, (N, 2) float64 array
        Pixel positions ``(u, v)`` in the left and right image.
    """
    import cv2

    sift = cv2.SIFT_create(nfeatures=features)
    kl, dl = sift.detectAndCompute(left, None)
    kr, dr = sift.detectAndCompute(right, None)
    if dl is None or dr is None or len(kl) < 2 or len(kr) < 2:
        return np.zeros((0, 2)), np.zeros((0, 2))
    matcher = cv2.BFMatcher(cv2.NORM_L2)
    forward = matcher.knnMatch(dl, dr, k=2)
    backward = {m[0].queryIdx: m[0].trainIdx for m in matcher.knnMatch(dr, dl, k=1) if m}
    pl, pr = [], []
    for pair in forward:
        if len(pair) < 2 or pair[0].distance >= ratio * pair[1].distance:
            continue
        m = pair[0]
        if backward.get(m.trainIdx) != m.queryIdx:  # consistent in both directions
            continue
        pl.append(kl[m.queryIdx].pt)
        pr.append(kr[m.trainIdx].pt)
    return np.array(pl, np.float64).reshape(-1, 2), np.array(pr, np.float64).reshape(-1, 2)


def match_residual_figures(rect: Rectification, left: np.ndarray, right: np.ndarray) -> dict:
    """Vertical residuals after rectification of feature matches of the original images.

    Matches are first verified against a fundamental matrix (RANSAC, 1 px), so
    the figures measure the rectification, not false matches.

    Returns
    -------
    dict
        ``matches``, ``median_px``, ``p95_px``, ``max_px`` (see :func:`residual_figures`).
    """
    import cv2

    pl, pr = feature_matches(grey8(left), grey8(right))
    if len(pl) >= 8:
        _F, mask = cv2.findFundamentalMat(pl, pr, cv2.FM_RANSAC, 1.0, 0.999)
        if mask is not None:
            keep = mask.ravel().astype(bool)
            pl, pr = pl[keep], pr[keep]
    return residual_figures(vertical_residuals(rect, pl, pr))


DEFAULT_FOCAL_FACTOR = 1.2
"""Focal length assumed without EXIF or estimate, in image widths (a normal lens:
about 43 mm on a 36 mm wide frame)."""

FOCAL_SANITY = (0.4, 5.0)
"""Focal lengths an estimate may take, in image widths (from fisheye-wide to long tele)."""


def _intrinsics(f: float, size) -> np.ndarray:
    w, h = size
    return np.array([[f, 0.0, (w - 1) / 2.0], [0.0, f, (h - 1) / 2.0], [0.0, 0.0, 1.0]])


def focal_from_fundamental(F: np.ndarray, size, *, steps: int = 200) -> tuple[float | None, dict]:
    """Focal length that makes ``K^T F K`` a valid essential matrix, when the pair fixes it.

    An essential matrix has two equal non-zero singular values (Hartley and
    Zisserman, *Multiple View Geometry*, 2nd ed., result 9.17). With a shared
    focal length ``f`` and the principal point at the image centre, the focal
    lengths of :data:`FOCAL_SANITY` are searched for the smallest
    ``(s1 - s2) / (s1 + s2)``. When the cameras look almost the same way the
    constraint holds for a wide band of ``f`` and the pair does not fix it:
    then None is returned.

    Parameters
    ----------
    F : (3, 3) float array
        Fundamental matrix, ``x_r^T F x_l = 0`` in pixels.
    size : (int, int)
        ``(width, height)``.

    Returns
    -------
    float or None
        The focal length in pixels, or None when not determined.
    dict
        ``cost`` at the minimum and ``band`` (ratio of the largest to the smallest
        focal length whose cost is near the minimum).
    """
    w = float(size[0])
    fs = w * np.geomspace(FOCAL_SANITY[0], FOCAL_SANITY[1], steps)
    costs = np.empty(steps)
    for i, f in enumerate(fs):
        K = _intrinsics(f, size)
        s = np.linalg.svd(K.T @ F @ K, compute_uv=False)
        costs[i] = (s[0] - s[1]) / max(s[0] + s[1], 1e-300)
    best = int(np.argmin(costs))
    near = fs[costs <= 2.0 * costs[best] + 0.002]
    band = float(near.max() / near.min())
    figures = {"cost": round(float(costs[best]), 5), "band": round(band, 3)}
    if 0 < best < steps - 1 and band < 1.3:
        return float(fs[best]), figures
    return None, figures


def uncalibrated_rectification(left: np.ndarray, right: np.ndarray, *,
                               focal_px: float | None = None, focal_source: str = "EXIF",
                               holdout: float = 0.3, seed: int = 0):
    """Rectify a pair of an unknown rig from its own feature matches.

    SIFT matches (ratio test, mutual) are split: ``1 - holdout`` of them fit the
    geometry, the rest only measure it. The focal length is estimated from the
    fundamental matrix (:func:`focal_from_fundamental`) where the pair fixes
    it, else ``focal_px`` (from EXIF) is used, else :data:`DEFAULT_FOCAL_FACTOR`
    image widths; the principal point is the image centre and distortion is
    taken as none. The essential matrix by RANSAC (``cv2.findEssentialMat``)
    and ``cv2.recoverPose`` give the right camera's pose with a unit baseline,
    which :func:`stereo_rectification` rectifies. The shape is approximate (an
    error in the focal length stretches or flattens relief) and unscaled.

    Parameters
    ----------
    left, right : (H, W) uint8 arrays
        Grey original images.
    focal_px : float, optional
        Focal length known from elsewhere (EXIF), pixels.
    focal_source : str
        Where ``focal_px`` came from, for the figures.
    holdout : float
        Share of matches kept out of the fit to measure it.
    seed : int
        Seed of the split (results are repeatable).

    Returns
    -------
    Rectification, dict
        The rectification (``rig.metric`` False, baseline 1) and its figures:
        focal length and how it was found, matches, inliers, the held-out
        vertical residual (median and 95th percentile, pixels), and ``swapped``
        (True when the second image is the left view; the caller swaps).

    Raises
    ------
    ValueError
        When the pair cannot be rectified: too few matches, no consistent
        geometry, cameras not side by side, or a large held-out residual.
    """
    import cv2

    h, w = left.shape[:2]
    size = (w, h)
    pl, pr = feature_matches(left, right)
    if len(pl) < 30:
        raise ValueError(f"only {len(pl)} reliable feature matches between the views (30 "
                         "needed); the images may not show the same scene, or show too "
                         "little texture")
    order = np.random.default_rng(seed).permutation(len(pl))
    n_fit = int(round(len(pl) * (1.0 - holdout)))
    fit, held = order[:n_fit], order[n_fit:]
    F, fmask = cv2.findFundamentalMat(pl[fit], pr[fit], cv2.FM_RANSAC, 1.0, 0.999)
    if F is None or F.shape != (3, 3) or fmask.sum() < 15:
        raise ValueError("the feature matches agree on no epipolar geometry; the views may "
                         "not be a stereo pair")
    estimate, focal_figures = focal_from_fundamental(F, size)
    if estimate is not None:
        f, how = estimate, "estimated from the fundamental matrix"
    elif focal_px:
        f, how = float(focal_px), focal_source
    else:
        f, how = DEFAULT_FOCAL_FACTOR * w, f"default ({DEFAULT_FOCAL_FACTOR} x image width)"
    K = _intrinsics(f, size)
    E, emask = cv2.findEssentialMat(pl[fit], pr[fit], K, cv2.RANSAC, 0.999, 1.0)
    if E is None or E.shape != (3, 3):
        raise ValueError("no essential matrix fits the matches; the views may not be a "
                         "stereo pair, or the camera only turned without moving")
    inliers = int(emask.sum())
    _in_front, R, t, _ = cv2.recoverPose(E, pl[fit], pr[fit], K, mask=emask.copy())
    t = t.ravel()
    if abs(t[0]) < 0.5 * np.linalg.norm(t):
        raise ValueError("the camera moved mostly forward or up between the views, not "
                         "sideways; such a pair cannot be rectified to rows")
    swapped = bool(t[0] > 0)
    figures = {"method": "uncalibrated", "focal_px": round(f, 2), "focal_source": how,
               "focal_estimate": focal_figures, "matches": int(len(pl)),
               "fit_matches": int(n_fit), "inliers": int(inliers), "swapped": swapped,
               "shape": "approximate", "scale": "unscaled"}
    if swapped:
        # The second view is the left one: rectify it as such.
        R, t = R.T, -R.T @ t
        pl, pr = pr, pl
    cal = StereoCalibration(K, np.zeros(5), K, np.zeros(5), R, t, size, metric=False)
    rect = stereo_rectification(cal)
    # Held-out matches consistent with the fitted geometry (2 px from their epipolar
    # line) measure it; the rest are counted as false matches.
    Kinv = np.linalg.inv(K)
    F_fit = Kinv.T @ _skew(t) @ R @ Kinv
    dist = _epipolar_distance(F_fit, pl[held], pr[held])
    good = dist < 2.0
    residual = vertical_residuals(rect, pl[held][good], pr[held][good])
    figures["held_out"] = {**residual_figures(residual), "share_consistent":
                           round(float(good.mean()) if len(good) else 0.0, 3)}
    if good.sum() < 5 or figures["held_out"]["median_px"] > 1.0:
        raise ValueError(f"the fitted geometry does not hold on the held-out matches "
                         f"({int(good.sum())} of {len(good)} consistent); the views may "
                         "have been taken with different lenses or zoom, or be too different")
    return rect, figures


def _skew(t: np.ndarray) -> np.ndarray:
    return np.array([[0.0, -t[2], t[1]], [t[2], 0.0, -t[0]], [-t[1], t[0], 0.0]])


def _epipolar_distance(F: np.ndarray, pl: np.ndarray, pr: np.ndarray) -> np.ndarray:
    """Distance of each right point from the epipolar line of its left point, pixels."""
    xl = np.column_stack([pl, np.ones(len(pl))])
    xr = np.column_stack([pr, np.ones(len(pr))])
    lines = xl @ F.T
    return np.abs(np.sum(lines * xr, 1)) / np.maximum(np.hypot(lines[:, 0], lines[:, 1]), 1e-12)
