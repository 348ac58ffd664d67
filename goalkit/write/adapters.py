"""Training-framework adapters over a built set: a numpy batch iterator, and PyTorch datasets.

``NumpyBatches`` needs nothing beyond numpy (JAX, or any other framework, takes its arrays);
``SampledBatches`` and ``TorchSampledBatches`` do the same for the on-the-fly samplers.
``TorchRows`` (map-style) and ``TorchBatches`` (iterable, sharded) subclass PyTorch's dataset
classes; torch is an optional extra (``pip install goalkit[torch]``) imported only when one of
them is first used, so ``import goalkit`` never imports it.

Every adapter pins column dtypes (:data:`DEFAULT_DTYPES`, except the columns whose dtype the set's
recipe chose, which keep their stored dtype; or the ``dtypes`` argument) with
:func:`cast_checked`, which refuses a cast that would overflow or change an integer's value.
Adapters hold only a path and settings, never an open file: each process (or data-loader
worker) opens the set itself, so they pickle and fork cleanly.
"""

from __future__ import annotations

import os
import tomllib
from typing import Iterator

import numpy as np

from goalkit.errors import DatasetError, GoalkitError
from goalkit.write.chunkread import SplitColumns
from goalkit.write.epochs import DEFAULT_MEMORY_BUDGET, shard_index
from goalkit.write.reader import open_set

#: Columns cast by default (float32 is what networks take; the log source as int64, the index
#: dtype of embedding look-ups, where PyTorch supports few operations on uint16); others keep
#: their stored dtype (the end flags ``termination`` / ``time_limit`` stay uint8). A head
#: column ``FIELD@HEAD`` (sets built with goal heads) is cast as its ``FIELD`` unless named itself.
DEFAULT_DTYPES = {"observation": "float32", "next_observation": "float32", "goal": "float32",
                  "reached_goal": "float32", "goal_distance": "float32", "reward": "float32",
                  "source": "int64"}


def cast_checked(name: str, values: np.ndarray, dtype) -> np.ndarray:
    """Cast a column to ``dtype``, refusing casts that lose more than float rounding.

    Floats may narrow (rounding) but not overflow to infinity; integers and flags must keep
    their exact values (in range, and exactly representable when cast to a float); floats cast
    to integers must hold whole numbers in range.

    Raises
    ------
    DatasetError
        Naming the column, both dtypes and the first offending value.

    Examples
    --------
    >>> cast_checked("goal", np.array([0.5]), "float32").dtype
    dtype('float32')
    >>> cast_checked("step", np.array([300]), "uint8")
    Traceback (most recent call last):
    ...
    goalkit.errors.DatasetError: column step: value 300 does not fit uint8
    """
    dtype = np.dtype(dtype)
    src = values.dtype
    if src == dtype:
        return values
    if np.can_cast(src, dtype, casting="safe"):
        return values.astype(dtype)
    if src.kind not in "biuf" or dtype.kind not in "biuf":
        raise DatasetError(f"column {name}: cannot cast {src} to {dtype}")
    with np.errstate(over="ignore", invalid="ignore"):  # what overflows is reported below
        out = values.astype(dtype)
    if src.kind == "f" and dtype.kind == "f":
        bad = np.isinf(out) & ~np.isinf(values)
    elif dtype.kind == "f":  # integers to a float: exactly representable
        bad = out.astype(src) != values
    elif src.kind == "f":  # floats to integers: whole and in range
        info = np.iinfo(dtype)
        bad = ~np.isfinite(values) | (values != np.floor(values)) | (values < info.min) | (values > info.max)
    else:
        info = np.iinfo(dtype)
        bad = (values < info.min) | (values > info.max)
    if np.any(bad):
        first = values[np.nonzero(bad)][0] if values.ndim else values
        raise DatasetError(f"column {name}: value {first} does not fit {dtype}")
    return out


def recipe_dtypes(recipe_text: str) -> dict:
    """Column -> dtype of the columns whose dtype a set's recipe chose.

    ``[output] observation_dtype`` (observation and next_observation), ``[output] action_dtype``
    (action) and an explicit ``[goal] dtype`` (goal and reached_goal). Adapters keep these
    stored dtypes by default instead of :data:`DEFAULT_DTYPES`: the recipe already chose them.

    Examples
    --------
    >>> recipe_dtypes('[output]\\nobservation_dtype = "float16"\\n[goal]\\nfields = ["head"]')
    {'observation': 'float16', 'next_observation': 'float16'}
    """
    try:
        doc = tomllib.loads(recipe_text)
    except (tomllib.TOMLDecodeError, TypeError):
        return {}
    out, goal = doc.get("output") or {}, doc.get("goal") or {}
    chosen = {}
    if isinstance(out, dict) and isinstance(out.get("observation_dtype"), str):
        chosen.update(observation=out["observation_dtype"], next_observation=out["observation_dtype"])
    if isinstance(out, dict) and isinstance(out.get("action_dtype"), str):
        chosen["action"] = out["action_dtype"]
    if isinstance(goal, dict) and isinstance(goal.get("dtype"), str):
        chosen.update(goal=goal["dtype"], reached_goal=goal["dtype"])
    return chosen


def _default_dtypes(path) -> dict:
    """:data:`DEFAULT_DTYPES`, except the columns whose dtype the set's recipe chose (kept as stored)."""
    try:
        with open_set(path) as gs:
            chosen = recipe_dtypes(gs.recipe)
    except GoalkitError:
        return dict(DEFAULT_DTYPES)        # reported when the set is read
    table = dict(DEFAULT_DTYPES)
    for name, dtype in chosen.items():
        table[name] = dtype
    return table


def _dtypes(dtypes, path=None) -> dict:
    if dtypes is None:
        table = DEFAULT_DTYPES if path is None else _default_dtypes(path)
    else:
        table = dict(dtypes)
    try:
        return {k: np.dtype(v) for k, v in table.items()}
    except TypeError as exc:
        raise DatasetError(f"dtypes: {exc}") from None


def _cast_of(name: str, dtypes: dict):
    """The cast of column ``name``: its own entry, else for a head column ``FIELD@HEAD`` its field's."""
    if name in dtypes:
        return dtypes[name]
    field, sep, _ = name.partition("@")
    return dtypes.get(field) if sep else None


def _cast(batch: dict, dtypes: dict) -> dict:
    """Cast the columns named in ``dtypes`` (a head column ``FIELD@HEAD`` as its ``FIELD``); a nested
    dict (a goal head's columns in a sampler batch) by the same names."""
    out = {}
    for k, v in batch.items():
        if isinstance(v, dict):
            out[k] = _cast(v, dtypes)
            continue
        dt = _cast_of(k, dtypes)
        out[k] = v if dt is None else cast_checked(k, v, dt)
    return out


class NumpyBatches:
    """Shuffled epochs of a built set as batches of numpy arrays (for JAX and others).

    Parameters
    ----------
    path : str or Path
        A built set.
    split : {"train", "validation"}
    batch_size : int
    columns : list of str, optional
        Columns to read (default: all).
    shuffle : bool or {"auto", "full", "passes", "pooled"}
        As :meth:`goalkit.GoalSet.batches`.
    seed, epoch : int
        One epoch's order is a pure function of (seed, epoch, shard); :meth:`set_epoch` moves on.
    memory_budget : int, optional
        Bytes of decoded rows held at once, per process (default 2 GiB).
    rank, world_size : int
        This process's place in a distributed job; each reads a disjoint, equal shard.
    remainder : {"drop", "pad"}
        The rows left after equal shards (docs/dataset.md).
    drop_last : bool
    dtypes : dict, optional
        Column -> dtype to cast to, checked (:func:`cast_checked`); default :data:`DEFAULT_DTYPES`
        except the columns whose dtype the set's recipe chose (:func:`recipe_dtypes`), which keep
        their stored dtype; ``{}`` keeps every stored dtype.
    row_numbers : bool
        Add ``"row"``, each row's number in the split.
    logs_root : str or Path, optional
        Indexed sets: the folder that now holds the logs, when they moved (as :class:`goalkit.GoalSet`).

    Examples
    --------
    >>> batches = NumpyBatches("gantry-goals.h5", batch_size=256, seed=0)   # doctest: +SKIP
    >>> for epoch in range(10):                                             # doctest: +SKIP
    ...     batches.set_epoch(epoch)
    ...     for batch in batches:
    ...         step(batch["observation"], batch["action"], batch["goal"], batch["reward"])
    """

    def __init__(self, path, split: str = "train", batch_size: int = 256, columns=None, *, shuffle=True,
                 seed: int = 0, epoch: int = 0, memory_budget: int | None = None, rank: int = 0,
                 world_size: int = 1, remainder: str = "drop", drop_last: bool = False, dtypes=None,
                 row_numbers: bool = False, logs_root=None):
        self.path = path
        self.logs_root = logs_root
        self.split = split
        self.batch_size = int(batch_size)
        self.columns = None if columns is None else list(columns)
        self.shuffle = shuffle
        self.seed = int(seed)
        self.epoch = int(epoch)
        self.memory_budget = memory_budget
        self.rank, self.world_size = int(rank), int(world_size)
        shard_index(self.rank, self.world_size)  # checked here, once
        self.remainder = remainder
        self.drop_last = drop_last
        self.dtypes = _dtypes(dtypes, path)
        self.row_numbers = bool(row_numbers)

    def set_epoch(self, epoch: int) -> None:
        """Use ``epoch`` for the next pass (each epoch has its own order)."""
        self.epoch = int(epoch)

    def _batches(self, worker: int = 0, workers: int = 1) -> Iterator[dict]:
        shard = shard_index(self.rank, self.world_size, worker, workers)
        with open_set(self.path, logs_root=self.logs_root) as gs:
            for batch in gs.batches(self.split, self.batch_size, self.columns, shuffle=self.shuffle, seed=self.seed,
                                    drop_last=self.drop_last, epoch=self.epoch, memory_budget=self.memory_budget,
                                    shard=shard, remainder=self.remainder, row_numbers=self.row_numbers):
                yield _cast(batch, self.dtypes)

    def __iter__(self) -> Iterator[dict]:
        return self._batches()


class SampledBatches:
    """Batches of an on-the-fly sampler (:class:`goalkit.GoalSampler`, :class:`goalkit.HeadSampler`).

    Batch indices ``start, start + 1, ...`` (up to ``stop``, or forever) are dealt to shards:
    shard ``k`` of ``n`` (data-loader workers times processes, :func:`shard_index`) draws indices
    ``start + k, start + k + n, ...``, so shards never draw the same batch and together draw
    every index once. Each batch is the sampler's batch of that index: replayable, whatever the
    sharding. Columns are cast as in :class:`NumpyBatches` (a head's dict by the same names).

    Parameters
    ----------
    sampler : GoalSampler or HeadSampler
        Anything with ``batch(batch_size, index) -> dict``.
    batch_size : int
    start : int
        First batch index (resume a run from here).
    stop : int, optional
        One past the last batch index; None: an endless stream.
    rank, world_size : int
    dtypes : dict, optional
        As :class:`NumpyBatches` (default :data:`DEFAULT_DTYPES`; ``{}`` keeps the sampler's dtypes).
    index : bool
        Add ``"batch_index"``: the batch's index (a 0-d int64 array).

    Examples
    --------
    >>> sampler = HeadSampler(load_recipe("gantry-demo/gantry-recipe.toml"))   # doctest: +SKIP
    >>> for batch in SampledBatches(sampler, 256, stop=1000):                   # doctest: +SKIP
    ...     step(batch["observation"], batch["value"]["goal"], batch["value"]["reward"])
    """

    def __init__(self, sampler, batch_size: int = 256, *, start: int = 0, stop: int | None = None, rank: int = 0,
                 world_size: int = 1, dtypes=None, index: bool = False):
        if not callable(getattr(sampler, "batch", None)):
            raise DatasetError("expected a sampler with a batch(batch_size, index) method")
        if int(batch_size) < 1 or int(start) < 0 or (stop is not None and int(stop) < int(start)):
            raise DatasetError(f"expected batch_size >= 1 and 0 <= start <= stop, got batch_size {batch_size}, "
                               f"start {start}, stop {stop}")
        self.sampler = sampler
        self.batch_size = int(batch_size)
        self.start, self.stop = int(start), None if stop is None else int(stop)
        self.rank, self.world_size = int(rank), int(world_size)
        shard_index(self.rank, self.world_size)  # checked here, once
        self.dtypes = _dtypes(dtypes)
        self.index = bool(index)

    def _batches(self, worker: int = 0, workers: int = 1) -> Iterator[dict]:
        shard, count = shard_index(self.rank, self.world_size, worker, workers)
        b = self.start + shard
        while self.stop is None or b < self.stop:
            batch = _cast(self.sampler.batch(self.batch_size, b), self.dtypes)
            if self.index:
                batch["batch_index"] = np.array(b, dtype=np.int64)
            yield batch
            b += count

    def __iter__(self) -> Iterator[dict]:
        return self._batches()


# ---- PyTorch (imported on first use) -----------------------------------------------------

def _torch():
    try:
        import torch
    except ImportError:
        raise GoalkitError("the PyTorch adapters need torch: pip install 'goalkit[torch]'") from None
    return torch


def _to_tensors(batch: dict, copy: bool = False) -> dict:
    """Tensors sharing the arrays' memory (``copy``: of copies; a 0-d value gives a 0-d tensor);
    a nested dict (a goal head's columns) becomes a dict of tensors."""
    torch = _torch()
    out = {}
    for k, v in batch.items():
        if isinstance(v, dict):
            out[k] = _to_tensors(v, copy)
            continue
        writable = isinstance(v, np.ndarray) and v.flags.writeable
        out[k] = torch.from_numpy(np.array(v, order="C") if copy or not writable else np.asarray(v, order="C"))
    return out


def _distributed() -> tuple[int, int]:
    torch = _torch()
    dist = torch.distributed
    if dist.is_available() and dist.is_initialized():
        return dist.get_rank(), dist.get_world_size()
    return 0, 1


def _make_torch_classes() -> dict:
    torch = _torch()

    class TorchBatches(torch.utils.data.IterableDataset):
        """Shuffled epochs of a built set as batches of tensors, sharded by worker and process.

        Use with ``torch.utils.data.DataLoader(dataset, batch_size=None, num_workers=N)``: each
        data-loader worker reads a disjoint, equal shard of the epoch (from
        ``torch.utils.data.get_worker_info``), and so does each process of a distributed job
        (``rank`` and ``world_size``, by default from ``torch.distributed`` when it is
        initialised). Call :meth:`set_epoch` before each epoch (workers are copies, so the epoch
        cannot advance by itself). Parameters as :class:`NumpyBatches`.
        """

        def __init__(self, path, split: str = "train", batch_size: int = 256, columns=None, *, shuffle=True,
                     seed: int = 0, epoch: int = 0, memory_budget: int | None = None, rank: int | None = None,
                     world_size: int | None = None, remainder: str = "drop", drop_last: bool = False, dtypes=None,
                     row_numbers: bool = False, logs_root=None):
            super().__init__()
            if rank is None or world_size is None:
                rank, world_size = _distributed()
            self.source = NumpyBatches(path, split, batch_size, columns, shuffle=shuffle, seed=seed, epoch=epoch,
                                       memory_budget=memory_budget, rank=rank, world_size=world_size,
                                       remainder=remainder, drop_last=drop_last, dtypes=dtypes,
                                       row_numbers=row_numbers, logs_root=logs_root)

        def set_epoch(self, epoch: int) -> None:
            """Use ``epoch`` for the next pass."""
            self.source.set_epoch(epoch)

        def __iter__(self):
            info = torch.utils.data.get_worker_info()
            worker, workers = (0, 1) if info is None else (info.id, info.num_workers)
            for batch in self.source._batches(worker, workers):
                yield _to_tensors(batch)

    class TorchRows(torch.utils.data.Dataset):
        """Rows of a built set by index (map-style), for samplers of your own.

        The split's columns are read into memory once per process, on first access (each
        stored chunk decoded once); a split larger than ``memory_budget`` is refused, use
        :class:`TorchBatches` instead. ``dataset[i]`` is a dict of tensors; a
        ``DataLoader(dataset, batch_size=B, shuffle=True)`` gathers each batch in one step.

        Parameters
        ----------
        path, split, columns, memory_budget, dtypes, logs_root
            As :class:`NumpyBatches`.
        """

        def __init__(self, path, split: str = "train", columns=None, *, memory_budget: int | None = None,
                     dtypes=None, logs_root=None):
            super().__init__()
            self.path, self.split = path, split
            self.logs_root = logs_root
            self.columns = None if columns is None else list(columns)
            self.memory_budget = DEFAULT_MEMORY_BUDGET if memory_budget is None else int(memory_budget)
            self.dtypes = _dtypes(dtypes, path)
            with open_set(path, logs_root=logs_root) as gs:
                reader = SplitColumns(gs, split, self.columns)
                self.rows = reader.rows
                need = reader.rows * reader.row_bytes()
                reader.close()
            if need > self.memory_budget:
                raise DatasetError(f"split {split} needs {need} bytes in memory, over the budget of "
                                   f"{self.memory_budget}; use TorchBatches to stream it", file=path)
            self._data = None
            self._pid = None

        def __getstate__(self):
            state = dict(self.__dict__)
            state["_data"] = state["_pid"] = None  # a worker process reads its own copy
            return state

        def _columns(self) -> dict:
            if self._data is None or self._pid != os.getpid():
                with open_set(self.path, logs_root=self.logs_root) as gs:
                    reader = SplitColumns(gs, self.split, self.columns)
                    try:
                        self._data = _cast(reader.read(0, reader.rows), self.dtypes)
                    finally:
                        reader.close()
                self._pid = os.getpid()
            return self._data

        def __len__(self) -> int:
            return self.rows

        def __getitem__(self, index):
            i = int(index)
            if not -self.rows <= i < self.rows:
                raise IndexError(f"row {i} out of range for a split of {self.rows} rows")
            return _to_tensors({k: v[i] for k, v in self._columns().items()}, copy=True)

        def __getitems__(self, indices):
            idx = np.asarray(indices, dtype=np.int64)
            data = _to_tensors({k: v[idx] for k, v in self._columns().items()})
            return [{k: v[j] for k, v in data.items()} for j in range(len(idx))]

    class TorchSampledBatches(torch.utils.data.IterableDataset):
        """An on-the-fly sampler's batches as tensors, sharded by worker and process.

        Use with ``DataLoader(dataset, batch_size=None, num_workers=N)``: data-loader worker
        ``w`` of process ``rank`` draws the batch indices of shard ``(rank * N + w, world_size * N)``
        (:class:`SampledBatches`), so no two workers draw the same batch. Parameters as
        :class:`SampledBatches` (``rank`` / ``world_size`` default to ``torch.distributed``'s).
        """

        def __init__(self, sampler, batch_size: int = 256, *, start: int = 0, stop: int | None = None,
                     rank: int | None = None, world_size: int | None = None, dtypes=None, index: bool = False):
            super().__init__()
            if rank is None or world_size is None:
                rank, world_size = _distributed()
            self.source = SampledBatches(sampler, batch_size, start=start, stop=stop, rank=rank,
                                         world_size=world_size, dtypes=dtypes, index=index)

        def __iter__(self):
            info = torch.utils.data.get_worker_info()
            worker, workers = (0, 1) if info is None else (info.id, info.num_workers)
            for batch in self.source._batches(worker, workers):
                yield _to_tensors(batch)

    classes = {"TorchBatches": TorchBatches, "TorchRows": TorchRows, "TorchSampledBatches": TorchSampledBatches}
    for cls in classes.values():
        cls.__module__ = __name__
        cls.__qualname__ = cls.__name__
    return classes


def __getattr__(name: str):
    if name in ("TorchBatches", "TorchRows", "TorchSampledBatches"):
        classes = _make_torch_classes()
        globals().update(classes)
        return classes[name]
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
