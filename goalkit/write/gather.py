"""Deferred row gathers: an output column given as ``source[index]``, copied only when written.

A materialised set repeats each logged observation once per goal slot, in two columns. Letting
the writer gather those rows straight into its block buffers saves a full intermediate copy of
the largest columns (see :class:`goalkit.write.writer.SetWriter`).
"""

from __future__ import annotations

import numpy as np


class RowGather:
    """The rows ``source[index]`` of an array, gathered on demand.

    Parameters
    ----------
    source : ndarray
        The array rows are taken from (along axis 0); not copied, so do not change it.
    index : ndarray of int64
        Row of ``source`` for each output row; every entry must lie in ``0 .. len(source) - 1``.

    Examples
    --------
    >>> import numpy as np
    >>> g = RowGather(np.arange(6.).reshape(3, 2), np.array([2, 0, 2]))
    >>> g.shape, len(g[1:])
    ((3, 2), 2)
    >>> np.asarray(g[1:]).tolist()
    [[0.0, 1.0], [4.0, 5.0]]
    """

    __slots__ = ("source", "index")

    def __init__(self, source: np.ndarray, index: np.ndarray):
        self.source = source
        self.index = np.asarray(index, dtype=np.int64)

    @property
    def dtype(self) -> np.dtype:
        return self.source.dtype

    @property
    def shape(self) -> tuple:
        return (len(self.index),) + self.source.shape[1:]

    def __len__(self) -> int:
        return len(self.index)

    def __getitem__(self, rows: slice) -> "RowGather":
        if not isinstance(rows, slice):
            raise TypeError("a RowGather is sliced by rows only (use numpy.asarray for more)")
        return RowGather(self.source, self.index[rows])

    def into(self, out: np.ndarray) -> None:
        """Write the rows into ``out`` (an array of shape :attr:`shape`), casting if needed."""
        if out.dtype == self.source.dtype and out.flags.c_contiguous:
            # indices are valid by construction; "clip" lets numpy write into out unbuffered
            np.take(self.source, self.index, axis=0, out=out, mode="clip")
        else:
            out[...] = np.take(self.source, self.index, axis=0)

    def __array__(self, dtype=None, copy=None):
        rows = np.take(self.source, self.index, axis=0)
        return rows if dtype is None else rows.astype(dtype, copy=False)


def materialise(columns: dict) -> dict:
    """The same columns with every :class:`RowGather` turned into an array."""
    return {n: np.asarray(v) if isinstance(v, RowGather) else v for n, v in columns.items()}
