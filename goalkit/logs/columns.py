"""Keys that take some columns of an array: ``{key = "state", columns = [14, 15, 16]}``.

A :class:`ColumnKey` is the array's key (a ``str``, so every reader finds, checks and reads the
array by it) with the columns to keep. The access objects (:mod:`goalkit.logs.access`) apply
the selection: the shape they report has ``len(columns)`` columns, and a read returns only
those columns, in the order given. An index outside the array's width is a one-line LogError
naming the file, the key and the width.
"""

from __future__ import annotations

import re

import numpy as np

from goalkit.errors import LayoutError, LogError

_SLICE = re.compile(r"^\s*(\d+)\s*:\s*(\d+)\s*$")


class ColumnKey(str):
    """An array key with a column selection.

    Parameters
    ----------
    key : str
        The array's key.
    columns : sequence of int
        Column indices to keep, in this order (repeats allowed), each ``>= 0``.

    Examples
    --------
    >>> k = ColumnKey("state", (14, 15, 16))
    >>> str(k), k.columns, k.label
    ('state', (14, 15, 16), 'state[14, 15, 16]')
    """

    def __new__(cls, key: str, columns):
        obj = super().__new__(cls, key)
        obj.columns = tuple(int(c) for c in columns)
        return obj

    @property
    def base(self) -> str:
        """The array's key as a plain string."""
        return str.__str__(self)

    @property
    def label(self) -> str:
        """The key with its columns, for messages (``state[14, 15, 16]``)."""
        return f"{self.base}[{', '.join(str(c) for c in self.columns)}]"

    def with_base(self, key: str) -> "ColumnKey":
        """The same columns of another array (``next_state`` for ``state``)."""
        return ColumnKey(key, self.columns)

    def __eq__(self, other):
        return (isinstance(other, ColumnKey) and str.__eq__(self, other) and self.columns == other.columns)

    def __ne__(self, other):
        return not self.__eq__(other)

    def __hash__(self):
        return hash((str.__str__(self), self.columns))

    def __repr__(self):
        return f"ColumnKey({self.base!r}, {list(self.columns)!r})"

    def __reduce__(self):
        return (ColumnKey, (self.base, self.columns))


def base_key(key) -> str:
    """The array's key of ``key`` (a plain key is returned as it is)."""
    return key.base if isinstance(key, ColumnKey) else key


def parse_key_value(value, *, file, key, allow_columns: bool = True):
    """A layout value: ``"name"`` or ``{key = "name", columns = [i, ...] or "a:b"}``.

    Raises
    ------
    LayoutError
        Naming the layout file and the key, for anything else.
    """
    if isinstance(value, str) and value:
        return value
    if not isinstance(value, dict):
        also = " (or a table {key = \"...\", columns = [...]})" if allow_columns else ""
        raise LayoutError(f"expected a non-empty string, got {value!r}{also}", file=file, key=key)
    if not allow_columns:
        raise LayoutError(f"expected a key name (a string); column selections are for the observation, "
                          f"next_observation, task_goal and [fields], got {value!r}", file=file, key=key)
    unknown = sorted(set(value) - {"key", "columns"})
    if unknown or "key" not in value or "columns" not in value:
        raise LayoutError(f"expected a table with exactly 'key' and 'columns', got keys {sorted(value)}",
                          file=file, key=key)
    name = value["key"]
    if not isinstance(name, str) or not name:
        raise LayoutError(f"expected a non-empty string, got {name!r}", file=file, key=f"{key}.key")
    cols = value["columns"]
    if isinstance(cols, str):
        m = _SLICE.match(cols)
        if m is None or int(m.group(1)) >= int(m.group(2)):
            raise LayoutError(f"expected a column range \"start:stop\" with start < stop, got {cols!r}",
                              file=file, key=f"{key}.columns")
        cols = list(range(int(m.group(1)), int(m.group(2))))
    if (not isinstance(cols, list) or not cols
            or any(isinstance(c, bool) or not isinstance(c, int) or c < 0 for c in cols)):
        raise LayoutError(f"expected a non-empty list of column indices >= 0 or a range \"start:stop\", got "
                          f"{value['columns']!r}", file=file, key=f"{key}.columns")
    return ColumnKey(name, cols)


def key_to_toml(key, tstr) -> str:
    """TOML text of a key value (``tstr`` quotes a string)."""
    if isinstance(key, ColumnKey):
        return f"{{key = {tstr(key.base)}, columns = [{', '.join(str(c) for c in key.columns)}]}}"
    return tstr(key)


def selected_shape(key, shape: tuple, *, file, where, episode=None) -> tuple:
    """The shape of ``key``'s selection of an array of ``shape`` (checks every index)."""
    if not isinstance(key, ColumnKey):
        return shape
    if len(shape) not in (1, 2):
        raise LogError(f"has shape {tuple(shape)}; expected a 1-D or 2-D array to take columns "
                       f"{list(key.columns)} from", file=file, key=where, episode=episode)
    width = 1 if len(shape) == 1 else shape[1]
    high = max(key.columns)
    if high >= width:
        raise LogError(f"column {high} is out of range: the array has {width} column"
                       f"{'s' if width != 1 else ''} (shape {tuple(shape)}); expected indices 0 .. {width - 1}",
                       file=file, key=where, episode=episode)
    return (shape[0], len(key.columns))


def select(key, values: np.ndarray) -> np.ndarray:
    """``key``'s columns of rows ``values`` (a plain key: ``values`` unchanged)."""
    if not isinstance(key, ColumnKey):
        return values
    if values.ndim == 1:
        values = values[:, None]
    return np.ascontiguousarray(values[:, list(key.columns)])
