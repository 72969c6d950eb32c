"""Matching costs: the unary term C(p, d) of the disparity energy.

A cost function takes two rectified grey images and a disparity range and
returns a ``(H, W, D)`` integer volume; :data:`COST_FUNCTIONS` maps the names
the parameter schema accepts to these functions, so that another cost (a
learned one, say) is added by registering one more entry.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from stereomesh.params import MAX_CENSUS_BITS


def _as_gray(image: np.ndarray, name: str) -> np.ndarray:
    image = np.asarray(image)
    if image.ndim != 2:
        raise ValueError(f"{name} must be a 2-D grey image, got shape {image.shape}")
    return np.ascontiguousarray(image, dtype=np.float32)


def census_transform(gray: np.ndarray, window: tuple[int, int] = (7, 5)) -> np.ndarray:
    """Census transform of a grey image.

    Parameters
    ----------
    gray : (H, W) array
        Grey image, any real dtype.
    window : (int, int)
        ``(width, height)`` of the odd-sized comparison window; at most 63
        comparisons (9×7 is the largest usual window).

    Returns
    -------
    (H, W) uint64
        One bit per neighbour (row-major over the window, centre skipped), set
        where the neighbour is darker than the centre. Borders replicate edge
        pixels.

    Examples
    --------
    >>> import numpy as np
    >>> img = np.array([[1, 2, 3], [4, 5, 6], [7, 8, 9]], float)
    >>> int(census_transform(img, (3, 3))[1, 1])  # 1, 2, 3, 4 darker than 5
    240
    """
    win_w, win_h = (int(v) for v in window)
    if win_w % 2 == 0 or win_h % 2 == 0 or win_w < 1 or win_h < 1:
        raise ValueError(f"census window sides must be odd and positive, got {window}")
    if win_w * win_h - 1 > MAX_CENSUS_BITS:
        raise ValueError(f"census window {window} has more than {MAX_CENSUS_BITS} comparisons")
    from stereomesh.matching import _kernels

    rw, rh = win_w // 2, win_h // 2
    padded = _kernels.edge_padded(_as_gray(gray, "gray"), rh, rw)
    return _kernels.census_transform(padded, win_w, win_h)


def census_cost(
    left: np.ndarray, right: np.ndarray, d_min: int, n_disp: int, window: tuple[int, int] = (7, 5)
) -> np.ndarray:
    """Census + Hamming distance cost volume.

    Robust to exposure and gain differences between the two cameras, since only
    the order of intensities within the window counts.

    Parameters
    ----------
    left, right : (H, W) array
        Rectified grey images.
    d_min : int
        Smallest disparity hypothesis (may be negative).
    n_disp : int
        Number of hypotheses; hypothesis ``k`` is disparity ``d_min + k``.
    window : (int, int)
        Census window ``(width, height)``.

    Returns
    -------
    (H, W, n_disp) uint8
        Hamming distance between the census strings of left pixel ``(y, x)``
        and right pixel ``(y, x - d)``; the window's bit count where the right
        pixel falls outside the image.

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(0)
    >>> right = rng.random((8, 20))
    >>> left = np.roll(right, 3, axis=1)  # true disparity 3
    >>> cost = census_cost(left, right, 0, 6, (3, 3))
    >>> int(cost[4, 10].argmin())
    3
    """
    left = _as_gray(left, "left")
    right = _as_gray(right, "right")
    if left.shape != right.shape:
        raise ValueError(f"left {left.shape} and right {right.shape} differ in shape")
    if n_disp < 1:
        raise ValueError(f"n_disp must be at least 1, got {n_disp}")
    from stereomesh.matching import _kernels

    n_bits = window[0] * window[1] - 1
    cl = census_transform(left, window)
    cr = census_transform(right, window)
    return _kernels.census_cost_volume(cl, cr, int(d_min), int(n_disp), np.uint8(n_bits))


def census_cost_reference(
    left: np.ndarray, right: np.ndarray, d_min: int, n_disp: int, window: tuple[int, int] = (7, 5)
) -> np.ndarray:
    """Slow pure-numpy census cost, kept as the reference for the kernel's tests."""
    left = np.asarray(left, np.float64)
    right = np.asarray(right, np.float64)
    h, w = left.shape
    rw, rh = window[0] // 2, window[1] // 2

    def bits(img):
        pad = np.pad(img, ((rh, rh), (rw, rw)), mode="edge")
        out = []
        for dy in range(-rh, rh + 1):
            for dx in range(-rw, rw + 1):
                if dy == 0 and dx == 0:
                    continue
                out.append(pad[rh + dy : rh + dy + h, rw + dx : rw + dx + w] < img)
        return np.stack(out, axis=-1)

    bl, br = bits(left), bits(right)
    n_bits = bl.shape[-1]
    cost = np.full((h, w, n_disp), n_bits, np.uint8)
    for k in range(n_disp):
        d = d_min + k
        for x in range(w):
            xr = x - d
            if 0 <= xr < w:
                cost[:, x, k] = (bl[:, x] != br[:, xr]).sum(axis=-1)
    return cost


def ad_gradient_cost(
    left: np.ndarray,
    right: np.ndarray,
    d_min: int,
    n_disp: int,
    window: tuple[int, int] = (5, 5),
    *,
    trunc_intensity: float = 20.0,
    trunc_gradient: float = 8.0,
    gradient_weight: float = 0.5,
    scale: int = 34,
) -> np.ndarray:
    """Truncated absolute difference of intensity and of horizontal gradient.

    ``C = scale · ((1 − w) · min(|ΔI|, τ_I) / τ_I + w · min(|Δ∂I/∂x|, τ_g) / τ_g)``,
    summed-averaged over a ``window`` box. The gradient term makes it tolerate
    a brightness offset between the cameras; the truncation limits the pull of
    occluded pixels. ``scale`` equals the bit count of a 7×5 census so that the
    same P1/P2 suit both costs.

    Parameters
    ----------
    left, right : (H, W) array
        Rectified grey images, 0–255 scale.
    d_min, n_disp : int
        Hypothesis ``k`` is disparity ``d_min + k``.
    window : (int, int)
        Box ``(width, height)`` over which pixel costs are averaged.
    trunc_intensity, trunc_gradient : float
        Truncations, grey levels and grey levels per pixel.
    gradient_weight : float
        Weight ``w`` of the gradient term in [0, 1].
    scale : int
        Cost of a pixel at both truncations (at most 255).

    Returns
    -------
    (H, W, n_disp) uint8

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(0)
    >>> right = rng.random((8, 20)) * 255
    >>> left = np.roll(right, 3, axis=1)
    >>> int(ad_gradient_cost(left, right, 0, 6, (1, 1))[4, 10].argmin())
    3
    """
    import cv2

    left = _as_gray(left, "left")
    right = _as_gray(right, "right")
    if left.shape != right.shape:
        raise ValueError(f"left {left.shape} and right {right.shape} differ in shape")
    if not 0.0 <= gradient_weight <= 1.0 or not 1 <= scale <= 255:
        raise ValueError("gradient_weight must be in [0, 1] and scale in [1, 255]")
    from stereomesh.matching import _kernels

    gl = np.ascontiguousarray(cv2.Sobel(left, cv2.CV_32F, 1, 0, ksize=3) / 8.0)
    gr = np.ascontiguousarray(cv2.Sobel(right, cv2.CV_32F, 1, 0, ksize=3) / 8.0)
    cost = _kernels.ad_gradient_cost_volume(
        left, right, gl, gr, int(d_min), int(n_disp), float(trunc_intensity),
        float(trunc_gradient), float(gradient_weight), float(scale), np.uint8(scale),
    )
    win_w, win_h = (int(v) for v in window)
    if win_w > 1 or win_h > 1:
        # OpenCV filters up to 512 channels at once: the hypotheses are the channels.
        for k0 in range(0, n_disp, 512):
            block = np.ascontiguousarray(cost[:, :, k0 : k0 + 512])
            cost[:, :, k0 : k0 + 512] = cv2.blur(block, (win_w, win_h)).reshape(block.shape)
    return cost


COST_FUNCTIONS: dict[str, Callable[..., np.ndarray]] = {
    "census": census_cost,
    "ad_gradient": ad_gradient_cost,
}
"""Registered cost functions by schema name: ``f(left, right, d_min, n_disp, **options)``."""
