"""Side-by-side stereo cards: split a scan into its two views, trim the mount.

Scanned stereo cards are not clean splits: each photograph sits in a mount of
card, possibly arched, faded or stained, the two prints differ a little in
size, crop and angle. Each half is cropped on its own to the largest
upright rectangle of photograph it holds, the two are brought to one scale
from their feature matches, and the uncalibrated rectification absorbs the
remaining turn and offset.
"""

from __future__ import annotations

import numpy as np

from stereomesh.errors import InputError


def mount_colour(image: np.ndarray, strip: float = 0.01) -> np.ndarray:
    """Median colour of the outermost strip of the scan, taken to be the mount.

    Parameters
    ----------
    image : (H, W, 3) uint8 array
    strip : float
        Width of the strip, share of the shorter side (at least 2 px).

    Returns
    -------
    (3,) float64 array

    Examples
    --------
    >>> card = np.full((40, 80, 3), 200, np.uint8); card[10:30, 10:70] = 20
    >>> mount_colour(card).tolist()
    [200.0, 200.0, 200.0]
    """
    h, w = image.shape[:2]
    s = max(2, int(round(strip * min(h, w))))
    edge = np.concatenate([image[:s].reshape(-1, 3), image[-s:].reshape(-1, 3),
                           image[:, :s].reshape(-1, 3), image[:, -s:].reshape(-1, 3)])
    return np.median(edge, axis=0).astype(np.float64)


def photo_rectangle(half: np.ndarray, mount: np.ndarray, *, threshold: float = 30.0,
                    full: float = 0.97) -> tuple[int, int, int, int]:
    """The largest upright rectangle of photograph in one half of a card.

    Pixels whose colour differs from the mount's by more than ``threshold``
    (8-bit levels, largest channel difference) or whose neighbourhood is more
    textured than the mount's edge are photo;
    the biggest connected region with its holes filled is the print; from its
    bounding box the least covered edge moves inward until every edge row and
    column is at least ``full`` print (a turned print or an arched mount loses
    its corners).

    Parameters
    ----------
    half : (H, W, 3) uint8 array
    mount : (3,) float array
        The mount colour (:func:`mount_colour`).
    threshold : float
    full : float

    Returns
    -------
    (int, int, int, int)
        ``(x0, y0, x1, y1)``, end exclusive, in the half's pixels.

    Raises
    ------
    InputError
        When no print is found.
    """
    import cv2

    diff = np.abs(half.astype(np.float32) - mount.astype(np.float32)).max(axis=2)
    k = max(3, (min(half.shape[:2]) // 100) | 1)
    # Sepia prints on buff mounts share colours: texture tells them apart too.
    # A pixel is print when its colour differs from the mount's or its
    # neighbourhood varies more than the mount's grain does.
    grey = cv2.cvtColor(half, cv2.COLOR_RGB2GRAY).astype(np.float32)
    mean = cv2.blur(grey, (k, k))
    spread = np.sqrt(np.maximum(cv2.blur(grey * grey, (k, k)) - mean * mean, 0.0))
    s = max(2, k)
    grain = float(np.median(np.concatenate([spread[:s].ravel(), spread[-s:].ravel()])))
    mask = ((diff > threshold) | (spread > 3.0 * grain + 1.0)).astype(np.uint8)
    mask = cv2.medianBlur(mask * 255, k) // 255
    mask = cv2.morphologyEx(mask, cv2.MORPH_CLOSE, np.ones((2 * k + 1, 2 * k + 1), np.uint8))
    count, labels, stats, _ = cv2.connectedComponentsWithStats(mask, connectivity=8)
    if count < 2:
        raise InputError("no photograph found in a half of the card")
    biggest = 1 + int(np.argmax(stats[1:, cv2.CC_STAT_AREA]))
    region = (labels == biggest).astype(np.uint8)
    contours, _ = cv2.findContours(region, cv2.RETR_EXTERNAL, cv2.CHAIN_APPROX_SIMPLE)
    filled = np.zeros_like(region)
    cv2.drawContours(filled, contours, -1, 1, thickness=cv2.FILLED)
    bx, by, bw, bh = cv2.boundingRect(filled)
    x0, y0, x1, y1 = bx, by, bx + bw, by + bh
    # Move the least covered edge inward until every edge row and column is
    # (almost) all print: a greedy search for a large inscribed rectangle.
    step = max(1, min(bw, bh) // 400)
    while x1 - x0 > 2 * step and y1 - y0 > 2 * step:
        cover = (filled[y0, x0:x1].mean(), filled[y1 - 1, x0:x1].mean(),
                 filled[y0:y1, x0].mean(), filled[y0:y1, x1 - 1].mean())
        worst = int(np.argmin(cover))
        if cover[worst] >= full:
            break
        if worst == 0:
            y0 += step
        elif worst == 1:
            y1 -= step
        elif worst == 2:
            x0 += step
        else:
            x1 -= step
    if (x1 - x0) < 0.2 * half.shape[1] or (y1 - y0) < 0.2 * half.shape[0]:
        raise InputError("the photograph in a half of the card is too small to use")
    # A margin of half a percent keeps the print's own edge (often a dark line) out.
    mx, my = int(0.005 * (x1 - x0)) + 1, int(0.005 * (y1 - y0)) + 1
    return int(x0 + mx), int(y0 + my), int(x1 - mx), int(y1 - my)


def split_card(image: np.ndarray, *, swap: bool = False):
    """Split a side-by-side scan into left and right views of one size.

    Parameters
    ----------
    image : (H, W, 3) uint8 or uint16 array
        The scan, left view on the left (unless ``swap``).
    swap : bool
        The left view is on the right (cross-eyed order).

    Returns
    -------
    (h, w, 3) array, (h, w, 3) array, dict
        The two views, same dtype as the scan, and figures: each half's crop
        ``(x0, y0, x1, y1)`` in scan pixels and the scale applied to the right.
    """
    import cv2

    from stereomesh.rectify import feature_matches, grey8

    eight = image if image.dtype == np.uint8 else (image >> 8).astype(np.uint8)
    mount = mount_colour(eight)
    mid = image.shape[1] // 2
    crops = []
    for offset, half in ((0, eight[:, :mid]), (mid, eight[:, mid:])):
        x0, y0, x1, y1 = photo_rectangle(half, mount)
        crops.append((x0 + offset, y0, x1 + offset, y1))
    views = [image[y0:y1, x0:x1] for x0, y0, x1, y1 in crops]
    if swap:
        views = views[::-1]
        crops = crops[::-1]
    left, right = views
    # One scale for both prints, from a similarity fitted to their matches.
    scale = 1.0
    pl, pr = feature_matches(grey8(left), grey8(right))
    if len(pl) >= 20:
        m, inl = cv2.estimateAffinePartial2D(pr, pl, method=cv2.RANSAC,
                                             ransacReprojThreshold=2.0)
        if m is not None:
            scale = float(np.hypot(m[0, 0], m[1, 0]))
    if 0.8 < scale < 1.25 and abs(scale - 1.0) > 0.002:
        size = (int(round(right.shape[1] * scale)), int(round(right.shape[0] * scale)))
        right = cv2.resize(right, size, interpolation=cv2.INTER_AREA if scale < 1
                           else cv2.INTER_LINEAR)
    else:
        scale = 1.0
    h = min(left.shape[0], right.shape[0])
    w = min(left.shape[1], right.shape[1])

    def centre(view):
        top, side = (view.shape[0] - h) // 2, (view.shape[1] - w) // 2
        return np.ascontiguousarray(view[top:top + h, side:side + w])

    figures = {"crops": [list(map(int, c)) for c in crops], "mount_colour":
               [round(float(v), 1) for v in mount], "right_scale": round(scale, 4),
               "view_size": [w, h]}
    return centre(left), centre(right), figures
