"""Top-down camera of the bench: 32 x 32 uint8 frames with the head and trays as blobs."""

from __future__ import annotations

import numpy as np

from goalkit.demo.bench import GantryParams

#: Frame height and width in pixels.
FRAME_SIZE = 32
#: Grey levels of the bench, the light strip and the trays.
BENCH_LEVEL, STRIP_LEVEL, TRAY_LEVEL = 40, 80, 150


def render(head: np.ndarray, trays: np.ndarray, params: GantryParams) -> np.ndarray:
    """Render top-down frames of the bench.

    Column ``j`` looks at ``x = (j + 0.5) length / 32`` and row ``i`` at
    ``y = (i + 0.5) depth / 32`` (the image stretches the bench's 2:1 top to a square).
    The bench is grey level 40, the light strip 80, trays are filled rectangles at 150,
    and the head is a Gaussian blob peaking at 255 whose width grows with height (the
    camera looks down from above, so a raised head looks larger): ``sigma = 0.02 + 0.04
    z / z_max`` metres.

    Parameters
    ----------
    head : ndarray, shape (N, 3)
        Head positions.
    trays : ndarray, shape (N, K)
        Tray centres along ``x``.
    params : GantryParams
        Bench constants.

    Returns
    -------
    ndarray of uint8, shape (N, 32, 32)

    Examples
    --------
    >>> p = GantryParams(trays=3)
    >>> head = np.array([[16.5 * 1.2 / 32, 16.5 * 0.6 / 32, 0.1]])   # over pixel (16, 16)
    >>> f = render(head, np.array([[0.3, 0.4, 0.5]]), p)
    >>> f.shape, f.dtype.name, int(f[0, 16, 16]), int(f[0, 0, 0])
    ((1, 32, 32), 'uint8', 255, 40)
    """
    n = FRAME_SIZE
    xs = (np.arange(n) + 0.5) * params.length / n           # columns
    ys = (np.arange(n) + 0.5) * params.depth / n            # rows
    base = np.full((n, n), BENCH_LEVEL, dtype=np.float64)
    base[:, (xs >= params.strip[0]) & (xs <= params.strip[1])] = STRIP_LEVEL
    frame = np.broadcast_to(base, (head.shape[0], n, n)).copy()
    in_lane = np.abs(ys[None, :] - params.lanes[:, None]) <= params.tray_half_depth   # (K, rows)
    for k in range(params.trays):
        in_x = np.abs(xs[None, :] - trays[:, k:k + 1]) <= params.tray_half_length     # (N, cols)
        mask = in_lane[k][None, :, None] & in_x[:, None, :]
        frame = np.where(mask, TRAY_LEVEL, frame)
    sigma = 0.02 + 0.04 * head[:, 2] / params.z_max
    dx = xs[None, None, :] - head[:, 0, None, None]
    dy = ys[None, :, None] - head[:, 1, None, None]
    blob = 255.0 * np.exp(-(dx * dx + dy * dy) / (2.0 * sigma[:, None, None] ** 2))
    frame = np.maximum(frame, blob)
    return np.rint(frame).astype(np.uint8)
