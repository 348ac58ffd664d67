"""Camera frames as embedding input: block-average downsampling, flattening, scaling to [0, 1]."""

from __future__ import annotations

import numpy as np

from goalkit.errors import EmbeddingError, shown
from goalkit.goals.base import Embedding, register

#: frames per chunk of the preprocessing (bounds the float64 working memory)
FRAME_CHUNK = 4096


def _check_block(block) -> tuple[int, int]:
    b = (block, block) if isinstance(block, (int, np.integer)) and not isinstance(block, bool) else tuple(block)
    if len(b) != 2 or not all(isinstance(v, (int, np.integer)) and not isinstance(v, bool) and v >= 1 for v in b):
        raise EmbeddingError(f"expected block a positive integer or a pair of them (rows, columns), got {shown(block)}")
    return int(b[0]), int(b[1])


def check_frames(frames, *, shape=None) -> np.ndarray:
    """Return ``frames`` as a uint8 array (M, H, W[, C]) or raise EmbeddingError."""
    arr = np.asarray(frames)
    if arr.dtype != np.uint8:
        raise EmbeddingError(f"expected camera frames of dtype uint8, got {arr.dtype}")
    if arr.ndim not in (3, 4):
        raise EmbeddingError(f"expected frames of shape (M, H, W) or (M, H, W, C), got {arr.shape}")
    if shape is not None and tuple(arr.shape[1:]) != tuple(shape):
        raise EmbeddingError(f"expected frames of shape {tuple(shape)} (as fitted), got {tuple(arr.shape[1:])}")
    return arr


def downsample(frames: np.ndarray, block: tuple[int, int]) -> np.ndarray:
    """Average ``block``-sized tiles, flatten and scale to [0, 1] (float64 (M, h * w * C)).

    Rows and columns that do not fill a whole block at the bottom/right edge are dropped.

    Examples
    --------
    >>> f = np.array([[[0, 255, 0], [255, 0, 0]]], dtype=np.uint8)   # one 2 x 3 frame
    >>> downsample(f, (2, 2)).tolist()
    [[0.5]]
    """
    m, H, W = frames.shape[:3]
    c = frames.shape[3] if frames.ndim == 4 else 1
    bh, bw = block
    h, w = H // bh, W // bw
    if h == 0 or w == 0:
        raise EmbeddingError(f"expected frames at least one block ({bh} x {bw}) in size, got {H} x {W}")
    out = np.empty((m, h * w * c))
    for a in range(0, m, FRAME_CHUNK):  # loop over chunks of frames
        f = frames[a:a + FRAME_CHUNK, :h * bh, :w * bw].astype(np.float64).reshape(-1, h, bh, w, bw, c)
        out[a:a + FRAME_CHUNK] = f.mean(axis=(2, 4)).reshape(f.shape[0], -1) / 255.0
    return out


@register
class FrameEmbedding(Embedding):
    """Preprocess camera frames, then apply another embedding to them.

    Parameters
    ----------
    embedding : Embedding
        The embedding fed with the preprocessed frames (Raw, Standardised, PCA or SFA).
    block : int or (int, int)
        Block size of the averaging (rows, columns); 1 keeps the resolution.

    Attributes
    ----------
    frame_shape_ : ndarray of int64
        ``(H, W)`` or ``(H, W, C)`` of the frames seen in ``fit``.

    Examples
    --------
    >>> from goalkit.goals.linear import Raw
    >>> frames = np.full((4, 4, 6), 51, dtype=np.uint8)
    >>> FrameEmbedding(Raw(), block=2).fit(frames).transform(frames[:1]).round(3).tolist()
    [[0.2, 0.2, 0.2, 0.2, 0.2, 0.2]]
    """

    kind = "frames"
    input_kind = "frame"
    _nested = True
    _params = ("block",)
    _arrays = ("frame_shape_",)

    def __init__(self, embedding: Embedding, block=2):
        self.embedding = embedding
        self.block = block

    def get_params(self) -> dict:
        b = self.block
        return {"block": list(b) if isinstance(b, (tuple, list)) else b}

    def __repr__(self) -> str:
        return f"FrameEmbedding({self.embedding!r}, block={self.block!r})"

    def preprocess(self, frames) -> np.ndarray:
        """Return the block-averaged, flattened, [0, 1]-scaled frames (float64)."""
        shape = None if not hasattr(self, "frame_shape_") else tuple(self.frame_shape_.tolist())
        return downsample(check_frames(frames, shape=shape), _check_block(self.block))

    def fit(self, X, offsets=None) -> "FrameEmbedding":
        """Fit the inner embedding on preprocessed frames ``X`` (uint8 (M, H, W[, C]))."""
        frames = check_frames(X)
        return self.fit_preprocessed(downsample(frames, _check_block(self.block)), offsets, frames.shape[1:])

    def fit_preprocessed(self, features, offsets, frame_shape) -> "FrameEmbedding":
        """Fit the inner embedding on frames already passed through :meth:`preprocess`.

        Lets a caller preprocess a log chunk by chunk and fit once on the small result.
        """
        if not isinstance(self.embedding, Embedding) or isinstance(self.embedding, FrameEmbedding) \
                or self.embedding.input_kind != "observation":
            raise EmbeddingError(f"expected an observation embedding (raw, standardised, pca, sfa) to feed "
                                 f"with frames, got {self.embedding!r}")
        bh, bw = _check_block(self.block)
        self.frame_shape_ = np.asarray(frame_shape, dtype=np.int64)
        self.embedding.fit(features, offsets)
        self._after_load(None)
        return self

    def _after_load(self, file) -> None:
        shape = np.asarray(self.frame_shape_)
        if shape.ndim != 1 or shape.shape[0] not in (2, 3) or np.any(shape < 1):
            raise self._shape_error("frame_shape_", "(H, W) or (H, W, C)", shape, file)
        self.frame_shape_ = shape.astype(np.int64)
        bh, bw = _check_block(self.block)
        c = int(shape[2]) if shape.shape[0] == 3 else 1
        width = (int(shape[0]) // bh) * (int(shape[1]) // bw) * c
        if not self.embedding.is_fitted or self.embedding.n_features_in_ != width:
            raise EmbeddingError(f"expected the inner embedding fitted on {width} preprocessed pixels",
                                 file=file, key="inner")
        self.n_features_in_ = width
        self.output_dim_ = self.embedding.output_dim_

    @property
    def is_fitted(self) -> bool:
        return hasattr(self, "frame_shape_") and self.embedding.is_fitted

    def transform(self, X) -> np.ndarray:
        self._check_fitted()
        return self.embedding.transform(self.preprocess(X))

    def summary(self) -> dict:
        out = self.embedding.summary()
        out["frames"] = {"block": self.get_params()["block"], "frame_shape": self.frame_shape_.tolist(),
                         "pixels": int(self.n_features_in_)}
        return out
