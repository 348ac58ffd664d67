"""Reader for step tables in Parquet (layout shape ``"table"``), through ``pyarrow``.

One row per step; ``[table] episode_column`` names the episode id column; an episode's rows are
consecutive. An episode of ``K`` rows has states ``s_0 .. s_{K-1}`` (the observation columns of
every row) and ``T = K - 1`` transitions: the action, reward, success and goal of its last row
have no following state and are not read (they may be null). A vector field is a fixed-size
list column, or several scalar columns named in one value separated by commas
(``"tip_x,tip_y,tip_z"``).

Opening reads the episode column only, one row group at a time; :meth:`TableSource.read` reads
the row groups that hold the requested episodes.
"""

from __future__ import annotations

import fnmatch
import os

import numpy as np

from goalkit.config import closest
from goalkit.errors import LayoutError, LogError
from goalkit.logs import checks
from goalkit.logs.naming import natural_sorted
from goalkit.logs.source import BaseSource


def _pa():
    try:
        import pyarrow as pa
        import pyarrow.parquet as pq
    except ImportError:  # pragma: no cover - the extra is installed in tests
        raise LogError("reading Parquet step tables needs pyarrow: pip install 'goalkit[tables]'") from None
    return pa, pq


def table_files(path, pattern) -> list[str]:
    """The Parquet file, or the files of a directory matching ``pattern`` in natural order."""
    path = str(path)
    if not os.path.exists(path):
        raise LogError("file not found", file=path)
    if os.path.isfile(path):
        return [path]
    names = [n for n in os.listdir(path) if fnmatch.fnmatchcase(n, pattern)
             and os.path.isfile(os.path.join(path, n))]
    if not names:
        raise LogError(f"no files match file_pattern = \"{pattern}\"", file=path, key="table.file_pattern")
    return [os.path.join(path, n) for n in natural_sorted(names)]


def column_array(col, width: int) -> np.ndarray:
    """A pyarrow column (scalar or fixed-size list) as a ``(rows, width)`` array; nulls become NaN."""
    pa, _ = _pa()
    arr = col.combine_chunks() if isinstance(col, pa.ChunkedArray) else col
    n = len(arr)
    if pa.types.is_fixed_size_list(arr.type):
        vals = arr.values.slice(arr.offset * width, n * width)
        out = vals.to_numpy(zero_copy_only=False).reshape(n, width)
    else:
        out = arr.to_numpy(zero_copy_only=False).reshape(n, 1)
    if arr.null_count:
        out = out.astype(np.float64)
        out[~np.asarray(arr.is_valid().to_numpy(zero_copy_only=False), dtype=bool)] = np.nan
    return out


class TableSource(BaseSource):
    """Parquet step tables. Use :func:`goalkit.logs.open_logs` to make one."""

    def __init__(self, path, layout, skip_bad_episodes=False, advance=None):
        super().__init__(path, layout, skip_bad_episodes, advance)
        _, pq = _pa()
        k = layout.keys
        for role in ("next_observation", "frame"):
            if getattr(k, role) is not None:
                raise LayoutError(f"[keys] {role} is not read from step tables", key=f"keys.{role}")
        spec = layout.record
        self.files = table_files(self.path, spec.file_pattern)
        self._roles = [("action", k.action)] + [(r, getattr(k, r)) for r in ("reward", "success", "task", "task_goal")
                                                if getattr(k, r) is not None]
        self._obs = layout.observation_keys()
        first = pq.ParquetFile(self.files[0])
        schema = first.schema_arrow
        self._widths = {}
        for ref in self._obs + [v for _, v in self._roles]:
            self._widths[ref] = sum(self._width(schema, c) for c in ref.split(","))
        self.action_width = self._widths[k.action]
        self.obs_width = sum(self._widths[r] for r in self._obs)
        edges = np.concatenate([[0], np.cumsum([self._widths[r] for r in self._obs])])
        if layout.fields:
            self.fields = {n: (int(edges[i]), int(edges[i + 1])) for i, (n, _) in enumerate(layout.fields)}
        types = [schema.field(c).type for r in self._obs for c in r.split(",")]
        self.obs_dtype = checks.float_dtype([self._np_dtype(t) for t in types])
        self.action_dtype = checks.float_dtype([self._np_dtype(schema.field(c).type)
                                                for c in k.action.split(",")])
        self._plan(pq)

    @staticmethod
    def _np_dtype(t):
        pa, _ = _pa()
        if pa.types.is_fixed_size_list(t):
            t = t.value_type
        return np.dtype(t.to_pandas_dtype()) if not pa.types.is_boolean(t) else np.dtype(bool)

    def _width(self, schema, col) -> int:
        pa, _ = _pa()
        col = col.strip()
        if col not in schema.names:
            near = closest(col, schema.names)
            raise LogError(f"no such column; columns: {', '.join(schema.names)}"
                           + (f" (closest: {near})" if near else ""), file=self.files[0], key=col)
        t = schema.field(col).type
        if pa.types.is_fixed_size_list(t):
            t, w = t.value_type, t.list_size
        elif pa.types.is_list(t) or pa.types.is_large_list(t):
            raise LogError("is a variable-length list column; expected a number or a fixed-size "
                           "list (pyarrow.list_(type, size))", file=self.files[0], key=col)
        else:
            w = 1
        if not (pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_boolean(t)):
            raise LogError(f"has type {t}; expected numbers", file=self.files[0], key=col)
        return int(w)

    def _plan(self, pq):
        col = self.layout.record.episode_column
        where, lengths = [], []          # (file, first row, rows) per episode
        for f_i, f in enumerate(self.files):
            pf = pq.ParquetFile(f)
            if col not in pf.schema_arrow.names:
                near = closest(col, pf.schema_arrow.names)
                raise LogError(f"no episode column; columns: {', '.join(pf.schema_arrow.names)}"
                               + (f" (closest: {near})" if near else ""), file=f, key=col)
            ids, rg_rows = [], []
            for g in range(pf.num_row_groups):        # one row group at a time
                a = pf.read_row_group(g, columns=[col]).column(0)
                ids.append(np.asarray(a.to_numpy(zero_copy_only=False)))
                rg_rows.append(len(a))
            ep = np.concatenate(ids) if ids else np.zeros(0, dtype=np.int64)
            if ep.size == 0:
                continue
            starts = np.concatenate([[0], np.flatnonzero(ep[1:] != ep[:-1]) + 1])
            labels = ep[starts]
            _, counts = np.unique(labels, return_counts=True)
            if np.any(counts > 1):
                dup = labels[np.isin(labels, np.unique(labels)[counts > 1])][0]
                raise LogError(f"episode {getattr(dup, 'item', lambda: dup)()!r} is split into several runs of rows; expected each "
                               f"episode's rows together", file=f, key=col)
            stops = np.concatenate([starts[1:], [ep.size]])
            for a, b in zip(starts.tolist(), stops.tolist()):
                where.append((f_i, a, b - a))
                lengths.append(b - a - 1)
            self._rg_edges = getattr(self, "_rg_edges", {})
            self._rg_edges[f_i] = np.concatenate([[0], np.cumsum(rg_rows)]).astype(np.int64)
        self._where = where
        problems = [(e, LogError("has a single row; expected at least 2 (T + 1 states)",
                                 file=self.files[w[0]], key=col, episode=e))
                    for e, w in enumerate(where) if w[2] < 2]
        self._settle(np.maximum(np.asarray(lengths, dtype=np.int64), 0), problems)

    def _file_of(self, episode):
        return self.files[self._where[episode][0]]

    def _read_rows(self, f_i, a, b, columns):
        """Rows ``a .. b - 1`` of a file, reading only the row groups that hold them."""
        _, pq = _pa()
        edges = self._rg_edges[f_i]
        g0 = int(np.searchsorted(edges, a, side="right") - 1)
        g1 = int(np.searchsorted(edges, b, side="left"))
        pf = pq.ParquetFile(self.files[f_i])
        t = pf.read_row_groups(list(range(g0, g1)), columns=columns)
        return t.slice(a - int(edges[g0]), b - a)

    def _read_episodes(self, ids):
        k = self.layout.keys
        cols = sorted({c.strip() for r in self._obs + [v for _, v in self._roles] for c in r.split(",")})
        parts = []
        ids = ids.tolist()
        i = 0
        while i < len(ids):                  # runs of consecutive episodes in one file
            j = i + 1
            while (j < len(ids) and ids[j] == ids[j - 1] + 1
                   and self._where[ids[j]][0] == self._where[ids[i]][0]):
                j += 1
            f_i, a, _ = self._where[ids[i]]
            _, b0, n0 = self._where[ids[j - 1]]
            table = self._read_rows(f_i, a, b0 + n0, cols)
            arrays = {c: column_array(table.column(c), self._width(table.schema, c)) for c in cols}
            rows = np.asarray([self._where[e][2] for e in ids[i:j]], dtype=np.int64)
            parts.append((arrays, rows))
            i = j

        def gather(ref, dtype, step_level):
            out = []
            for arrays, rows in parts:
                v = np.concatenate([arrays[c.strip()] for c in ref.split(",")], axis=1)
                if step_level:               # drop the last row of each episode
                    last = np.cumsum(rows) - 1
                    keep = np.ones(v.shape[0], dtype=bool)
                    keep[last] = False
                    v = v[keep]
                out.append(v)
            return np.concatenate(out).astype(dtype, copy=False)

        res = {"observations": np.concatenate([gather(r, self.obs_dtype, False) for r in self._obs], axis=1),
               "actions": gather(k.action, self.action_dtype, True)}
        if k.reward is not None:
            res["rewards"] = gather(k.reward, np.float64, True)[:, 0]
        if k.success is not None:
            s = gather(k.success, np.float64, True)[:, 0]
            res["success"] = checks.flags(s, file=self.files[self._where[ids[0]][0]], key=k.success)
        if k.task_goal is not None:
            res["task_goals"] = gather(k.task_goal, np.float64, True)
        if k.task is not None:
            rows = np.concatenate([p[1] for p in parts])
            first = np.cumsum(rows) - rows
            res["task_ids"] = gather(k.task, np.float64, False)[first, 0].astype(np.int64)
        return res

    def key_info(self) -> list[dict]:
        """Role, column(s), stored type and width of every mapped column."""
        _, pq = _pa()
        schema = pq.ParquetFile(self.files[0]).schema_arrow
        pairs = [(r, v) for r, v in self.layout.keys.items()] + [(f"field {n}", v) for n, v in self.layout.fields]
        return [{"role": r, "key": v, "dtype": ", ".join(str(schema.field(c.strip()).type) for c in v.split(",")),
                 "shape": [self._widths.get(v, 1)]} for r, v in pairs]
