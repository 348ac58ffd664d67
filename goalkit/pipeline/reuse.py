"""Reusing the work of an earlier build when logs grow (``keep_work``; issue 12).

A build with ``keep_work`` cuts its episodes into *units* that never span two log files (runs
of consecutive episodes of one file, cut by output rows as shards are) and keeps each unit's
rows in the work folder (:mod:`goalkit.pipeline.workfolder`) under the unit's key. The next
build takes a unit's rows from there instead of relabelling it when the unit's key is the same.

A unit's key is a SHA-256 over everything its rows depend on:

- the build-wide part (:func:`build_record`): the recipe without its log paths (so adding a
  file to ``[logs] path`` or a source's ``path`` keeps it), the effective seed, the goalkit
  version, the embedding and goal library checksums, the stored columns and their dtypes, the
  goal map and the goal masks;
- the unit's own part (:func:`unit_keys`): the SHA-256 of its log file (computed for the
  provenance anyway, on a side thread; no array is read to decide), the source's recipe table
  and layout text, the episodes' positions in that file, their stable ids, lengths, splits
  and source code.

Rows are pure functions of these (every random draw is addressed by seed, episode id, step,
slot and stream), except for their row keys, which follow the global transition index; units
are stored with keys relative to their first transition and moved to their place on reading.

Reuse is refused (every unit relabelled, the reason reported) when rows of old episodes may
depend on the other episodes: strategies that take goals from other episodes or a library
search over every state (:func:`refusal`), or a ``[graph]`` over every state.

Episode ids are positions in a source's files taken one after the other, so a file added
*after* a source's last file keeps every old unit; a file that sorts before some of a
source's old files moves their ids, and those units are relabelled. Other sources never move.
"""

from __future__ import annotations

import hashlib
import json
import pickle

import numpy as np

from goalkit import __version__
from goalkit.config import parse_toml
from goalkit.errors import DatasetError
from goalkit.logs.episodes import chunk_bounds
from goalkit.pipeline.headcols import needs_goal_table as heads_need_table
from goalkit.pipeline.plan import SLOT_SPAN, active_strategies
from goalkit.pipeline.chunk import ChunkRows, relabel_chunk
from goalkit.pipeline.shardfiles import SHARD_FORMAT_VERSION, ShardSpec
from goalkit.pipeline.sources import layout_texts
from goalkit.pipeline.workfolder import WorkFolder
from goalkit.relabel.strategies import STRATEGIES
from goalkit.write.gather import materialise
from goalkit.write.writer import os_reason

#: Version of the unit key's definition (a change here makes old units unusable).
REUSE_VERSION = 1


def refusal(recipe) -> str | None:
    """Why a build's rows of old episodes may change when logs are added (None: they do not)."""
    crossing = [n for n in active_strategies(recipe.mixture) if STRATEGIES[n].goal_table]
    if crossing:
        many = len(crossing) > 1
        return f"strateg{'ies' if many else 'y'} {', '.join(crossing)} take{'' if many else 's'} goals from other episodes"
    if getattr(recipe, "graph", None) is not None:
        return "the [graph] table's graph spans every episode"
    output = getattr(recipe, "output", None)
    if output is not None and getattr(output, "goals", "slots") == "heads" and heads_need_table(recipe.heads):
        return "goal heads draw random states from other episodes"
    return None


def _parts(source) -> list[tuple]:
    """``[(first, stop, files, local_ids, code)]``, one per log of the source in reading order:
    its kept-episode positions ``first .. stop - 1``, how many of ``source.files`` it reads, the
    episodes' ids within it and its source code (None for a source that is one log)."""
    parts = getattr(source, "parts", None)
    starts = getattr(source, "_starts", None)
    if parts is None or starts is None:   # one log (a file or a per-file folder): one part
        n = len(source.episode_ids)
        return [(0, n, len(list(source.files)), np.asarray(source.episode_ids, np.int64), None)]
    return [(int(starts[i]), int(starts[i + 1]), len(list(p.log.files)), np.asarray(p.log.episode_ids, np.int64),
             p.code) for i, p in enumerate(parts)]


def plan_units(plan, source, transitions_per_unit: int) -> list[ShardSpec]:
    """Cut the kept episodes into units: chunks of at most ``transitions_per_unit`` transitions
    that never span two log files (the output does not depend on the cut)."""
    lengths = np.asarray(plan.lengths, dtype=np.int64)
    ids = np.asarray(plan.episode_ids, dtype=np.int64)
    out = []
    for first, stop, *_ in _parts(source):
        for a, b in chunk_bounds(lengths[first:stop], max(1, int(transitions_per_unit))):
            a, b = a + first, b + first
            out.append(ShardSpec(index=len(out), start=a, stop=b, first_episode=int(ids[a]),
                                 last_episode=int(ids[b - 1]), transitions=int(lengths[a:b].sum())))
    return out


def _recipe_without_paths(text: str):
    """The recipe's tables without the log paths: (build-wide part, list of source tables)."""
    doc = parse_toml(text, "recipe")
    logs = doc.get("logs")
    if isinstance(logs, dict):
        doc["logs"] = {k: v for k, v in logs.items() if k != "path"}
    sources = [{k: v for k, v in s.items() if k != "path"} for s in doc.pop("sources", None) or []
               if isinstance(s, dict)]
    return doc, sources


def _canon(value) -> str:
    return json.dumps(value, sort_keys=True, default=str)


def build_record(plan, inputs) -> str:
    """The build-wide part of every unit key (see the module notes), as canonical JSON."""
    doc, _ = _recipe_without_paths(plan.recipe.text)
    record = inputs.key_record()
    masks = hashlib.sha256(pickle.dumps(plan.masks, protocol=4)).hexdigest()
    return _canon({
        "reuse_version": REUSE_VERSION, "shard_format": SHARD_FORMAT_VERSION, "goalkit_version": __version__,
        "recipe": doc, "seed": record["seed"],
        "layout_text": "" if plan.recipe.sources is not None else record["layout_text"],
        "embedding_files": [f[1:] for f in record["embedding_files"]],
        "library_files": [f[1:] for f in record["library_files"]],
        "columns": {n: [np.dtype(d).str, list(s)] for n, (d, s) in plan.columns.items()},
        "goal_map": plan.goal_map.describe(), "masks": masks, "slot_span": SLOT_SPAN,
    })


def unit_keys(plan, source, units, inputs) -> list[str] | None:
    """The key of each unit (see the module notes); None when the logs cannot say which file
    holds each episode (then nothing is reused)."""
    common = build_record(plan, inputs).encode()
    digests = [f["sha256"] for f in inputs.log_files]
    parts = _parts(source)
    if sum(p[2] for p in parts) != len(digests) or parts[-1][1] != len(plan.episode_ids):
        return None
    recipe = plan.recipe
    _, tables = _recipe_without_paths(recipe.text)
    texts = layout_texts(recipe, source) if recipe.sources is not None else {}
    part_info, where, n_files = [], np.zeros(len(plan.episode_ids), np.int64), 0
    for k, (first, stop, files, local, code) in enumerate(parts):
        files_digest = digests[n_files:n_files + files]
        n_files += files
        table = tables[code] if code is not None and code < len(tables) else {}
        part_info.append((_canon({"files": files_digest, "code": code, "table": table,
                                  "layout": texts.get(code, "")}).encode(), first, local))
        where[first:stop] = k
    ids = np.asarray(plan.episode_ids, np.int64)
    lengths = np.asarray(plan.lengths, np.int64)
    splits = np.asarray(plan.splits, np.int8)
    keys = []
    for spec in units:
        h = hashlib.sha256(common)
        k = int(where[spec.start])
        info, first, local = part_info[k]
        h.update(info)
        a, b = spec.start - first, spec.stop - first
        h.update(f"|{b - a}|".encode())
        for arr in (local[a:b], ids[spec.start:spec.stop], lengths[spec.start:spec.stop],
                    splits[spec.start:spec.stop]):
            h.update(np.ascontiguousarray(arr).tobytes())
        keys.append(h.hexdigest())
    return keys


def _relative_spec(spec) -> ShardSpec:
    """The unit as stored: positions from 0 (its place in a build is not part of it)."""
    return ShardSpec(index=0, start=0, stop=spec.stop - spec.start, first_episode=spec.first_episode,
                     last_episode=spec.last_episode, transitions=spec.transitions)


def _moved(rows, by: int) -> ChunkRows:
    """``rows`` with every row key moved by ``by``."""
    return ChunkRows(rows.columns, {s: np.asarray(k, np.int64) + by for s, k in rows.keys.items()})


def _arrays(rows) -> ChunkRows:
    """Rows with deferred gathers materialised (as they would be written)."""
    return ChunkRows({s: materialise(c) for s, c in rows.columns.items()}, rows.keys)


class ReuseProducer:
    """Wrap a producer: take units from the work folder where their keys match, let ``inner``
    compute the others, keep every unit's rows for the next build.

    Parameters
    ----------
    inner : InProcessProducer or ShardProducer
    output : Path
        The dataset path (the work folder is ``.NAME.work`` beside it).
    """

    def __init__(self, inner, output):
        self.inner = inner
        self.sharded = inner.sharded
        self.rows_per_chunk = inner.rows_per_chunk
        self.resume_advice = inner.resume_advice
        self.folder = WorkFolder(output)
        self.reason = None
        self.keys = []
        self.ready = set()
        self.reused = set()

    def launch(self) -> None:
        """The inner producer's launch, if it has one (workers start while the build plans)."""
        launch = getattr(self.inner, "launch", None)
        if launch is not None:
            launch()

    def plan_chunks(self, plan, source, transitions: int) -> list[ShardSpec]:
        """The build's chunks: units that never span two log files (:func:`plan_units`)."""
        return plan_units(plan, source, transitions)

    def open(self, plan, source, chunks, inputs) -> None:
        """Key the units, find those already kept, hand the others to ``inner``."""
        self.plan, self.source, self.chunks = plan, source, chunks
        self.columns = list(plan.columns)
        self.reason = refusal(plan.recipe)
        if self.reason is None:
            self.keys = unit_keys(plan, source, chunks, inputs.result())
            if self.keys is None:
                self.reason = "the logs do not say which file holds each episode"
        if self.reason is None:   # else the work folder is left as it is
            self.folder.open()
            self.ready = {s.index for s, k in zip(chunks, self.keys) if self.folder.has(k)}
        pending = [s for s in chunks if s.index not in self.ready]
        self.inner.open(plan, source, pending, inputs)

    def rows(self, count):
        """Yield ``(spec, ChunkRows)`` for every unit in order; ``count`` runs here, in order."""
        offsets = self.plan.transition_offsets
        computed = self.inner.rows(lambda rows: None)
        for i, spec in enumerate(self.chunks):
            base = int(offsets[spec.start]) * SLOT_SPAN
            rows = None
            if spec.index in self.ready:
                rows = self.folder.read(self.keys[i], _relative_spec(spec), self.columns)
                if rows is not None:
                    rows = _moved(rows, base)
                    self.reused.add(spec.index)
            if rows is None and spec.index in self.ready:   # a damaged unit file: relabel it here
                rows = relabel_chunk(self.plan, self.source.read(spec.start, spec.stop))
                self._keep(i, spec, rows, base)
            elif rows is None:
                done, rows = next(computed)
                if done.index != spec.index:  # pragma: no cover - producers yield in order
                    raise RuntimeError(f"expected unit {spec.index}, got {done.index}")
                rows = _arrays(rows)
                self._keep(i, spec, rows, base)
            count(rows)
            yield spec, rows
        for _ in computed:  # pragma: no cover - every pending unit was taken above
            pass

    def _keep(self, i, spec, rows, base) -> None:
        if self.reason is None:
            try:
                self.folder.write(self.keys[i], _relative_spec(spec), _moved(rows, -base), self.columns)
            except OSError as exc:
                raise DatasetError(f"cannot write the work folder ({os_reason(exc)}); the units already kept "
                                   f"stay for the next build with --keep-work", file=self.folder.path) from None

    def finish(self) -> None:
        self.inner.finish()

    def abandon(self) -> None:
        """After a failure: the inner producer's abandon; finished units stay for the next run."""
        self.inner.abandon()
        self.folder.release()

    def write_failure(self, exc: BaseException):
        return self.inner.write_failure(exc)

    def cleanup(self) -> None:
        """After the dataset is written: the inner cleanup; keep only this build's units."""
        self.inner.cleanup()
        if self.reason is None:
            self.folder.prune(self.keys)
        self.folder.release()

    def info(self):
        return self.inner.info()

    def reuse_info(self) -> dict:
        """``{"episodes": {"reused", "new"}, "units": {...}, "folder", "files", "bytes", "reason"}``."""
        reused = self.reused
        eps = sum(s.stop - s.start for s in self.chunks if s.index in reused)
        total = sum(s.stop - s.start for s in self.chunks)
        files, size = self.folder.size() if self.reason is None else (0, 0)
        return {"episodes": {"reused": eps, "new": total - eps},
                "units": {"reused": len(reused), "computed": len(self.chunks) - len(reused)},
                "folder": str(self.folder.path), "files": files, "bytes": size, "reason": self.reason}

