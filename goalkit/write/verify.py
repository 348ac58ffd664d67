"""Verify a built set against its source logs, trusting nothing stored in it.

Checks, in order:

0. the file holds what a set holds and nothing else (attributes, groups, columns, each column as
   long as its split's ``rows`` attribute, the manifest listing exactly the stored columns) and
   its seal matches (format version 2; see :mod:`goalkit.write.seal`);
1. the source log files (regular files only) still have the checksums recorded at build time,
   wherever they are now (:mod:`goalkit.write.relocate`: beside the set, at the recorded path,
   or under a new root); recorded paths are compared as recorded;
2. the stored recipe, run with the set's ``seed`` attribute, produces exactly the stored columns
   (names, dtypes, row shapes, chunking, compression) and the ``rows`` and ``episodes``
   attributes of each split (checked before any column is read);
3. every column matches the manifest's SHA-256; row by row, from the logs: observations,
   actions and next observations are the logged steps; every goal equals phi at its recorded source step (or the log's task goal for
   ``original`` rows); each strategy's rule holds (future goals come from the same episode
   strictly after the transition, final goals are the last state, and so on); no goal crosses
   the split; ``steps_to_goal`` is ``j - t``; distance, reward, reached flag and terminal flag
   recompute from the reward rule;
4. the rows are exactly what the stored recipe and the set's ``seed`` attribute produce (the
   relabelling is re-run);
5. the summary and the provenance equal the ones re-derived from those rows, the recipe and the
   logs (only ``provenance.recipe_file`` and ``goalkit_version`` are recorded facts, covered by
   the seal; the latter must agree with the root attribute);
6. an audit that shares no code with the builder (:mod:`goalkit.audit`, docs/audit.md): every
   row against the documented rules, and the draws against their documented laws.
"""

from __future__ import annotations

import os
from collections import deque
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from types import SimpleNamespace

import numpy as np

from goalkit.audit import AuditFeed, record_audit
from goalkit.errors import DatasetError, GoalkitError, shown
from goalkit.logs.episodes import chunk_bounds
from goalkit.pipeline.build import chunk_transitions, final_summary, helped_layout, log_paths
from goalkit.pipeline.chunk import relabel_chunk, row_labels
from goalkit.logs import spare
from goalkit.pipeline.plan import make_plan, split_rows
from goalkit.pipeline.readproc import ChunkReader
from goalkit.pipeline.readproc import wanted as readproc_wanted
from goalkit.pipeline.summary import SummaryBuilder
from goalkit.relabel.strategies import strategy_names
from goalkit.reward import score
from goalkit.rows import END_FLAG_SOURCES
from goalkit.write.checklane import CheckLane
from goalkit.write.chunkread import SplitColumns
from goalkit.write.format import SPLIT_CODES, SPLITS
from goalkit.write.gather import RowGather
from goalkit.write.reader import GoalSet, ManifestCheck
from goalkit.write.relocate import locate
from goalkit.write.rederive import (as_stored, check_columns, differences, provenance_differences,
                                    source_entries, stored_recipe)
from goalkit.write.rules import check_goal_rules
from goalkit.write.seal import check_layout, check_seal, stored_strategy_codes
from goalkit.write.search_checks import check_joined


#: Chunks of episodes read ahead of the one being checked.
READ_AHEAD = 2


@dataclass
class VerifyReport:
    """Outcome of :func:`verify_set`.

    Attributes
    ----------
    ok : bool
        True when every check passed.
    failures : list of str
        The first failures found (at most ``max_failures``).
    checked : dict
        What was checked: rows per split, files, columns.
    """

    ok: bool = True
    failures: list = field(default_factory=list)
    checked: dict = field(default_factory=dict)
    max_failures: int = 20

    def fail(self, message: str) -> None:
        self.ok = False
        if len(self.failures) < self.max_failures:
            self.failures.append(message)

    def as_dict(self) -> dict:
        return {"ok": self.ok, "failures": list(self.failures), "checked": dict(self.checked)}


def _row_text(cols, row) -> str:
    return (f"episode {int(cols['source_episode'][row])} step {int(cols['source_step'][row])} "
            f"slot {int(cols['slot'][row])}")


def _first(mask) -> int:
    return int(np.flatnonzero(mask)[0])


def _rows_differ(a, b) -> np.ndarray:
    """``np.any(a != b, axis=1)`` over rows (arrays of shape (n, k)): the rows where they differ.

    Compared once as flat arrays first; the per-row reduction (slow over a short second axis)
    runs only when something differs.
    """
    ne = a != b
    if ne.ndim == 2 and not ne.any():
        return np.zeros(len(ne), bool)
    return np.any(ne, axis=1)


class _Runs:
    """Runs of equal values of an int array (stored rows come grouped by episode).

    :meth:`spread` gives ``f(values)`` from ``f(self.values)``, for any ``f`` that maps each
    value on its own (a position, a length, membership): ``f`` runs once per run, not per row.
    """

    def __init__(self, values):
        values = np.asarray(values)
        self.n = len(values)
        starts = np.flatnonzero(values[1:] != values[:-1]) + 1 if self.n > 1 else np.zeros(0, np.int64)
        starts = np.concatenate((np.zeros(min(self.n, 1), np.int64), starts))
        self.values = values[starts]
        self.lengths = np.diff(np.append(starts, self.n))

    def spread(self, per_run) -> np.ndarray:
        return np.repeat(per_run, self.lengths, axis=0)


def check_rows(plan, chunk, cols, split_name, report, row0, seen=None) -> None:
    """Check stored rows ``cols`` of one chunk against the logs and the rules (no re-derivation).

    ``seen`` (a dict), when given, receives ``name -> (logged array, row index, rows differing)``
    of the observation, action and next_observation comparisons (for :func:`_compare`).
    """
    n_rows = len(cols["source_episode"])
    if n_rows == 0:
        return
    goal_dtype = np.dtype(plan.recipe.goal.dtype)
    source_ep, steps = cols["source_episode"], cols["source_step"]
    runs = _Runs(source_ep)
    if not np.isin(runs.values, chunk.episode_ids).all():
        report.fail(f"{split_name} row {row0}: source episodes outside the logs' chunk")
        return
    pos_runs = chunk.position_of(runs.values)
    pos = runs.spread(pos_runs)
    lengths = runs.spread(chunk.lengths[pos_runs])
    bad = (steps < 0) | (steps >= lengths)
    if bad.any():
        row = _first(bad)
        report.fail(f"{split_name} row {row0 + row} ({_row_text(cols, row)}): step outside the episode "
                    f"(0 .. {int(lengths[row]) - 1})")
        return
    cur = chunk.state_row(pos, steps)
    trans = chunk.offsets[pos] + steps
    code = SPLIT_CODES[split_name]
    wrong_split = runs.spread(plan.splits[plan.positions(runs.values)] != code)
    if wrong_split.any():
        row = _first(wrong_split)
        report.fail(f"{split_name} row {row0 + row} ({_row_text(cols, row)}): the episode belongs to the other split")
    if "observation" in cols:
        logged = (("observation", chunk.observations, cur), ("action", chunk.actions, trans),
                  ("next_observation", chunk.observations, cur + 1))
        for (name, source, index), ref in zip(logged, [np.take(source, index, axis=0) for _, source, index in logged]):
            diff = _rows_differ(np.asarray(cols[name]).reshape(n_rows, -1),
                                np.asarray(ref, dtype=cols[name].dtype).reshape(n_rows, -1))
            if seen is not None:
                seen[name] = (source, index, diff)
            if diff.any():
                row = _first(diff)
                report.fail(f"{split_name} row {row0 + row} ({_row_text(cols, row)}): {name} is not the logged value")
    for name, attr in END_FLAG_SOURCES.items():   # the environment's end flags, from the logs
        if name in cols:
            logged = getattr(chunk, attr)
            diff = np.ones(n, bool) if logged is None else cols[name] != logged[trans].astype(np.uint8)
            if diff.any():
                row = _first(diff)
                report.fail(f"{split_name} row {row0 + row} ({_row_text(cols, row)}): {name} is not the log's "
                            f"flag of the transition")
    if "source" in cols:
        diff = np.ones(n, bool) if chunk.sources is None else cols["source"] != chunk.sources[pos]
        if diff.any():
            row = _first(diff)
            report.fail(f"{split_name} row {row0 + row} ({_row_text(cols, row)}): source is not the episode's source")
    phi = plan.goal_map(chunk, np.arange(chunk.observations.shape[0])).astype(goal_dtype)
    achieved = np.take(phi, cur + 1, axis=0)
    if "reached_goal" in cols:
        diff = _rows_differ(cols["reached_goal"], achieved)
        if diff.any():
            row = _first(diff)
            report.fail(f"{split_name} row {row0 + row} ({_row_text(cols, row)}): reached_goal is not phi(s_t+1)")
    # goals: phi at the recorded goal address, from the logs
    goal_ep, goal_step = cols["goal_episode"], cols["goal_step"]
    internal = goal_ep >= 0
    if internal.any():
        inner = _Runs(goal_ep[internal])
        known = inner.spread(np.isin(inner.values, plan.episode_ids))
        if not known.all():
            row = _first(internal) if known.all() else np.flatnonzero(internal)[_first(~known)]
            report.fail(f"{split_name} row {row0 + row} ({_row_text(cols, row)}): goal episode "
                        f"{int(goal_ep[row])} is not in the logs")
            return
        gpos_runs = plan.positions(inner.values)
        glen = inner.spread(plan.lengths[gpos_runs])
        out = (goal_step[internal] < 0) | (goal_step[internal] > glen)
        if out.any():
            row = np.flatnonzero(internal)[_first(out)]
            report.fail(f"{split_name} row {row0 + row} ({_row_text(cols, row)}): goal step {int(goal_step[row])} outside "
                        f"episode {int(goal_ep[row])}")
            return
        crosses = inner.spread(plan.splits[gpos_runs] != code)
        if crosses.any():
            row = np.flatnonzero(internal)[_first(crosses)]
            report.fail(f"{split_name} row {row0 + row} ({_row_text(cols, row)}): the goal comes from episode "
                        f"{int(goal_ep[row])} of the other split")
        expect = _goal_at(plan, chunk, phi, goal_ep[internal], goal_step[internal], inner).astype(goal_dtype,
                                                                                                  copy=False)
        diff = _rows_differ(cols["goal"][internal], expect)
        if diff.any():
            row = np.flatnonzero(internal)[_first(diff)]
            report.fail(f"{split_name} row {row0 + row} ({_row_text(cols, row)}): goal is not phi of episode "
                        f"{int(goal_ep[row])} step {int(goal_step[row])}")
    either = _Runs(np.where(internal, goal_ep, source_ep))
    for message, mask in check_goal_rules(cols, lengths, either.spread(plan.lengths[plan.positions(either.values)])):
        if mask.any():
            row = _first(mask)
            report.fail(f"{split_name} row {row0 + row} ({_row_text(cols, row)}): {message}")

    check_joined(plan, chunk, cols, phi, pos, split_name, report, row0, _row_text)
    for name, ref in score(plan.recipe.reward, achieved, cols["goal"], cols.get("goal_mask")).columns().items():
        diff = cols[name] != ref
        if diff.any():
            row = _first(diff)
            report.fail(f"{split_name} row {row0 + row} ({_row_text(cols, row)}): {name} {shown(cols[name][row])} does not "
                        f"recompute from the reward rule (expected {shown(ref[row])})")
    if "discount_weight" in cols:  # the training labels, from the stored steps and terminal flag
        labels = row_labels(cols["steps_to_goal"], plan.recipe.mixture.gamma, cols["terminal"])
        for name, ref in labels.items():
            diff = cols[name] != ref
            if diff.any():
                row = _first(diff)
                report.fail(f"{split_name} row {row0 + row} ({_row_text(cols, row)}): {name} {shown(cols[name][row])} does "
                            f"not recompute from steps_to_goal and [relabel] gamma (expected {shown(ref[row])})")


def _strategy_code_problems(file) -> list[str]:
    """The strategy columns' own code tables (when stored) against the strategy table."""
    table = strategy_names()
    out = []
    for split in SPLITS:
        if "strategy" not in file[split]:
            continue
        stored = stored_strategy_codes(file[split]["strategy"], f"{split}/strategy")
        wrong = sorted(code for code, name in (stored or {}).items() if table.get(code) != name)
        if wrong:
            out.append(f"{split}/strategy: attribute codes names code {wrong[0]} "
                       f"{stored[wrong[0]]!r}, the strategy table calls it {table.get(wrong[0])!r}")
    return out


def _goal_at(plan, chunk, phi_chunk, episodes, steps, runs=None) -> np.ndarray:
    """phi at (episode id, step), from the chunk when the episode is in it, else from the logs
    (``runs``: the runs of ``episodes``, when the caller has them)."""
    out = np.empty((len(episodes), phi_chunk.shape[1]), dtype=phi_chunk.dtype)
    runs = _Runs(episodes) if runs is None else runs
    inside_runs = np.isin(runs.values, chunk.episode_ids)
    inside = runs.spread(inside_runs)
    if inside.all():   # the usual case: every goal from the chunk's episodes
        positions = runs.spread(chunk.position_of(runs.values))
        np.take(phi_chunk, chunk.state_row(positions, steps), axis=0, out=out)
    elif inside.any():
        positions = chunk.position_of(episodes[inside])
        out[inside] = phi_chunk[chunk.state_row(positions, steps[inside])]
    if (~inside).any():
        if plan.goal_table is None:
            raise RuntimeError("goal table needed for goals from other chunks")
        out[~inside] = plan.goal_table[plan.global_state_rows(episodes[~inside], steps[~inside])]
    return out


def verify_set(path, max_failures: int = 20, progress=None, audit: bool = True, logs_root=None) -> VerifyReport:
    """Verify the set at ``path``; see the module docstring for what is checked.

    Parameters
    ----------
    path : str or Path
    max_failures : int
        Stop collecting messages after this many.
    progress : callable, optional
        Called as ``progress(transitions_done_in_chunk, total_transitions)`` after each chunk.
    audit : bool
        Also run :func:`goalkit.audit.audit_set` (its result goes to ``checked["audit"]``).
    logs_root : str or Path, optional
        The folder that now holds the logs, when they moved (see :mod:`goalkit.write.relocate`).

    Returns
    -------
    VerifyReport

    Raises
    ------
    DatasetError
        When the file cannot be read as a set (naming the file and the key), when a file it was
        built from is found nowhere, or when the file found under ``logs_root`` has another checksum.
    """
    report = VerifyReport(max_failures=max_failures)
    with GoalSet(path) as goal_set:
        # 0. what is stored: attributes, groups and columns as a set has them; the seal
        stored_as = goal_set.stored
        for message in check_layout(goal_set.file, goal_set.path, stored_as) + check_seal(goal_set.file, stored_as):
            report.fail(message)
        report.checked["sealed"] = goal_set.stored.seal is not None
        report.checked["format_version"] = goal_set.stored.version
        if not report.ok:
            return report
        for message in _strategy_code_problems(goal_set.file):
            report.fail(message)
        # 1. source files
        source_entries(goal_set)
        relocation = locate(goal_set.path, goal_set.provenance, logs_root, strict=False)
        for want, place, problem in relocation.problems:
            if want.text is None:   # a changed layout file shows as a changed layout_text
                report.fail(f"source file {place}: {problem}")
        digests = relocation.digests
        report.checked["source_files"] = len(goal_set.provenance.get("log_files", []))
        moved = {rec: found for rec, found in relocation.found.items()
                 if os.path.realpath(rec) != os.path.realpath(found)}
        if moved:
            report.checked["moved_files"] = moved
        if not report.ok:
            return report
        # 2. the recipe with the set's own seed; the columns and row counts it produces (before
        #    any column is read, so a huge declared column is never read)
        recipe = stored_recipe(goal_set, report, relocation)
        if recipe is None:
            return report
        # a spare helper process plans part of a large log's episodes, then reads the chunks
        with spare.scope(log_paths(recipe), early=helped_layout(recipe)):
            try:
                plan, source = make_plan(recipe)
            except GoalkitError as exc:
                raise DatasetError(f"cannot reopen what this set was built from: {exc}",
                                   file=goal_set.path) from None
            if not check_columns(goal_set, plan, split_rows(plan), report):
                return report
            # 3. manifest: each column's SHA-256, fed the rows the replay reads (so they are decoded
            #    once); its messages come before the rows' (the replay's are held until then)
            manifest = ManifestCheck(goal_set)
            report.checked["columns"] = len(goal_set.manifest)
            rows_report = VerifyReport(max_failures=max_failures, checked=report.checked)
            # 4 + 5. rows, checked and re-derived; the summary re-derived alongside (_replay)
            # 6. the audit (rules and laws re-stated independently of the builder, docs/audit.md), fed
            #    the rows and log episodes read here, so that each is read and decompressed once
            feed = _LateFeed(path, relocation, source) if audit else None
            try:
                complete = _replay(goal_set, plan, source, recipe, rows_report, relocation, digests, progress, feed,
                                   manifest)
                for message in manifest.problems() + rows_report.failures:
                    report.fail(message)
                report.ok = report.ok and rows_report.ok
                if not complete:
                    return report
                if feed is not None:
                    result, feed = feed.finish(), None
            finally:
                if feed is not None:
                    feed.close()
    if audit:
        record_audit(report, result)
    return report


def _replay(goal_set, plan, source, recipe, report, relocation, digests, progress, feed, manifest) -> bool:
    """Steps 4 and 5 of :func:`verify_set`; False when verify must stop (rows missing)."""
    summary = SummaryBuilder(strategy_names(), plan.total_rows, recipe.seed,
                             distance_unit=recipe.reward.reach_threshold, rule=recipe.reward)
    total = {split: goal_set.rows(split) for split in SPLITS}
    stored_names = {split: goal_set.columns(split) for split in SPLITS}
    readers = {split: SplitColumns(goal_set, split, stored_names[split], keep_tails=True)
               for split in SPLITS if stored_names[split]}
    try:
        return _replay_rows(goal_set, plan, source, report, relocation, digests, progress, feed, manifest,
                            summary, total, stored_names, readers)
    finally:
        for reader in readers.values():
            reader.close()


def _chunks_ahead(plan, source, bounds):
    """Yield ``(first, stop, EpisodeSet)`` of every chunk of ``bounds`` in order, read up to two
    chunks ahead on a thread (by a reader process for grouped and per-file logs, as the build
    reads them); a chunk the reader cannot give is read with ``source.read``, which raises any
    problem as before. The first item is None, yielded once the reads have begun (the reader
    process starts meanwhile)."""
    specs = [SimpleNamespace(start=a, stop=b, transitions=int(plan.lengths[a:b].sum())) for a, b in bounds]
    chunk_reader = ChunkReader(source, bounds) if readproc_wanted(source, specs) else None
    read = source.read if chunk_reader is None else chunk_reader.read
    try:
        with ThreadPoolExecutor(max_workers=1, thread_name_prefix="goalkit-verify-read") as pool:
            pending = deque(pool.submit(read, a, b) for a, b in bounds[:READ_AHEAD])
            yield None
            for i, (a, b) in enumerate(bounds):
                chunk = pending.popleft().result()
                if i + READ_AHEAD < len(bounds):
                    pending.append(pool.submit(read, *bounds[i + READ_AHEAD]))
                yield a, b, chunk
    finally:
        if chunk_reader is not None:
            chunk_reader.close()


def _expected_ranges(plan, bounds) -> list:
    """Row ranges ``{split: (first, stop)}`` each chunk's rows should take, from the plan's
    lengths, splits and goal counts: where to start reading stored rows ahead. Only a guess
    (the replay's own rows decide); a chunk whose rows differ is read when it is checked."""
    per_episode = plan.lengths * plan.episode_goals()
    cursor = {split: 0 for split in SPLITS}
    out = []
    for a, b in bounds:
        here = {}
        for code, split in enumerate(SPLITS):
            n = int(per_episode[a:b][plan.splits[a:b] == code].sum())
            here[split] = (cursor[split], cursor[split] + n)
            cursor[split] += n
        out.append(here)
    return out


class _StoredAhead:
    """Stored rows of the next chunk, decoded on the readers' threads while this one is checked.

    ``take`` gives the rows of a chunk and split: the ones read ahead when their range is the
    one asked for, else read then (:func:`_stored_rows`); either way the same arrays.
    """

    def __init__(self, goal_set, readers, names, totals, ranges):
        self.goal_set, self.readers, self.names, self.totals = goal_set, readers, names, totals
        self.ranges = ranges
        self.pending = {}

    def start(self, i: int) -> None:
        """Begin decoding the stored rows expected for chunk ``i`` (when it exists)."""
        if i >= len(self.ranges):
            return
        for split, (a, b) in self.ranges[i].items():
            reader = self.readers.get(split)
            if reader is None or b <= a or b > self.totals[split]:
                continue
            try:
                self.pending[(i, split)] = (a, b, reader.start([(a, b)]))
            except Exception:   # noqa: BLE001  read again when checked, which raises it in its place
                pass

    def take(self, i: int, split: str, a: int, b: int) -> tuple:
        """Stored rows ``a .. b - 1`` of ``split`` for chunk ``i``: ``(rows, unreadable)``, where
        ``unreadable`` lists the stored chunks HDF5 could not read either (see :func:`_read_apart`;
        their columns are left out of ``rows``)."""
        ahead = self.pending.pop((i, split), None)
        if ahead is not None and ahead[:2] == (a, b):
            try:
                return self.readers[split].finish(ahead[2]), []
            except DatasetError:   # a chunk that does not inflate: h5py reads it and gives its verdict
                return _hdf5_rows(self.goal_set, split, self.names[split], a, b)
        if ahead is not None:   # read ahead for nothing: let its decoding finish before reading again
            _settle(ahead[2])
        return _stored_rows(self.goal_set, self.readers, split, self.names[split], a, b)

    def close(self) -> None:
        for _, _, started in self.pending.values():
            _settle(started)
        self.pending.clear()


def _settle(started) -> None:
    """Wait for the decoding jobs of a :meth:`SplitColumns.start` whose rows are not used."""
    for job in started[2]:
        job.exception()


def _stored_rows(goal_set, readers, split, names, a, b) -> tuple:
    """Stored rows ``a .. b - 1`` of ``split``: chunks inflated on threads, else through h5py;
    ``(rows, unreadable)`` as :meth:`_StoredAhead.take`."""
    reader = readers.get(split)
    if reader is not None:
        try:
            return reader.read(a, b), []
        except DatasetError:   # a chunk that does not inflate: h5py reads it and gives its verdict
            pass
    return _hdf5_rows(goal_set, split, names, a, b)


def _hdf5_rows(goal_set, split, names, a, b) -> tuple:
    """Rows ``a .. b - 1`` read by h5py; when HDF5 cannot read some stored chunk (bytes that do
    not decompress), the columns are read apart to find which (:func:`_read_apart`)."""
    try:
        return goal_set.read(split, names, a, b, resolve=False), []
    except OSError:
        return _read_apart(goal_set, split, names, a, b)


def _read_apart(goal_set, split, names, a, b) -> tuple:
    """Rows ``a .. b - 1`` of each column read through h5py one stored chunk at a time.

    Returns ``(rows, unreadable)``: ``rows`` holds the columns read whole, ``unreadable`` a
    ``(column, first row, end row)`` for every stored chunk HDF5 could not read.
    """
    group = goal_set.file[split]
    rows, unreadable = {}, []
    for name in names:
        ds = group[name]
        step = int(ds.chunks[0]) if ds.chunks else max(1, int(ds.shape[0]))
        dest = np.empty((b - a, *ds.shape[1:]), dtype=ds.dtype)
        whole = True
        for c0 in range(a - a % step, b, step):
            lo, hi = max(a, c0), min(b, c0 + step)
            try:
                ds.read_direct(dest, np.s_[lo:hi], np.s_[lo - a:hi - a])
            except OSError:
                whole = False
                unreadable.append((name, c0, min(c0 + step, int(ds.shape[0]))))
        if whole:
            rows[name] = dest
    return rows, unreadable


def _side_checks(manifest, feed, split, row0, row_stop, stored, chunk, unreadable=()) -> None:
    """The checks of one chunk's stored rows that need nothing from the replay: their manifest
    checksums and the audit (run on the lane's thread, in the order the rows were read).

    With ``unreadable`` stored chunks, the columns that were read are still hashed; the others'
    checksums are left out (the chunk is reported) and the audit is told these rows were not
    read."""
    manifest.add(split, row0, stored)
    if unreadable:
        manifest.unreadable(split, [name for name, _, _ in unreadable])
        if feed is not None:
            feed.unread(split, row0, row_stop)
    elif feed is not None:
        feed.add(split, row0, row_stop, stored, chunk)


def _report_unreadable(report, path, split, unreadable, found) -> None:
    """One failure per stored chunk that could not be read (each once; ``found`` remembers them)."""
    for name, c0, c1 in unreadable:
        if (split, name, c0) in found:
            continue
        found.add((split, name, c0))
        report.checked.setdefault("unreadable", []).append({"split": split, "column": name, "rows": [c0, c1]})
        report.fail(f"{path}: {split}/{name} rows {c0} .. {c1 - 1} cannot be read (the stored chunk does not "
                    f"decompress): the rows of its episodes are not checked")


def _replay_rows(goal_set, plan, source, report, relocation, digests, progress, feed, manifest, summary, total,
                 stored_names, readers) -> bool:
    """The rows of every chunk of episodes: checked, re-derived, audited; then summary and provenance.

    The main thread relabels and checks each chunk's rows; the stored rows of the next chunk
    decode meanwhile on the readers' threads, and the manifest checksums and the audit of the
    rows run on a :class:`~goalkit.write.checklane.CheckLane`, in the order the rows were read.
    """
    bounds = list(chunk_bounds(plan.lengths, chunk_transitions(plan)))
    ahead = _StoredAhead(goal_set, readers, stored_names, total, _expected_ranges(plan, bounds))
    lane = CheckLane()
    try:
        try:
            complete = _replay_chunks(plan, source, report, progress, feed, manifest, summary, total, bounds,
                                      ahead, lane)
            lane.drain()
        except Exception:
            earlier = lane.failed_before()   # a task handed over before this failure came first
            if earlier is not None:
                raise earlier from None
            raise
    finally:
        lane.close()
        ahead.close()
    if complete is None:
        return False
    cursor = complete
    for split in SPLITS:
        if cursor[split] != total[split]:
            report.fail(f"{split}: {total[split]} rows stored, the recipe produces {cursor[split]}")
            if feed is not None:   # rows beyond what the recipe produces: the audit reads them itself
                feed.add_stored(split, cursor[split], total[split])
    report.checked["rows"] = {split: total[split] for split in SPLITS}
    report.checked["episodes"] = int(len(plan.episode_ids))
    # 5. summary and provenance, re-derived
    fresh_summary = relocation.restore(as_stored(final_summary(summary, plan, source)))
    if "composition" not in goal_set.summary:  # a set built before the composition was stored
        fresh_summary.pop("composition", None)
    for message in differences(fresh_summary, goal_set.summary, "summary"):
        report.fail(message)
    for message in provenance_differences(goal_set, plan, source, digests, relocation):
        report.fail(message)
    return True


class _LateFeed:
    """The audit's :class:`~goalkit.audit.AuditFeed`, made when :meth:`open` is first called (the
    replay calls it once the logs' reads have begun, so that the audit's set-up does not delay
    them); the same calls, passed on."""

    def __init__(self, path, relocation, opened):
        self.args, self.feed = (path, relocation, opened), None

    def open(self):
        if self.feed is None:
            path, relocation, opened = self.args
            self.feed = AuditFeed(path, relocation=relocation, opened=opened)
        return self.feed

    def add(self, *args) -> None:
        self.open().add(*args)

    def unread(self, *args) -> None:
        self.open().unread(*args)

    def add_stored(self, *args) -> None:
        self.open().add_stored(*args)

    def finish(self):
        return self.open().finish()

    def close(self) -> None:
        if self.feed is not None:
            self.feed.close()


def _replay_chunks(plan, source, report, progress, feed, manifest, summary, total, bounds, ahead, lane):
    """Check and re-derive every chunk's rows; the rows each split reached (None: rows missing)."""
    cursor = {split: 0 for split in SPLITS}
    found = set()   # stored chunks reported unreadable
    chunks = _chunks_ahead(plan, source, bounds)
    try:
        next(chunks)   # the logs' reads begin (and the reader process starts) first
        ahead.start(0)
        if feed is not None:   # the audit's set-up (it reads the stored source_episode) meanwhile
            feed.open()
        for i, (first_ep, stop_ep, chunk) in enumerate(chunks):
            ahead.start(i + 1)
            fresh = relabel_chunk(plan, chunk, defer_gathers=True)
            for split in SPLITS:
                n_rows = len(fresh.keys.get(split, ()))
                row0, row_stop = cursor[split], cursor[split] + n_rows
                if row_stop > total[split]:
                    report.fail(f"{split}: fewer rows stored ({total[split]}) than the recipe produces")
                    return None
                stored, unreadable = ahead.take(i, split, row0, row_stop)
                if unreadable:   # rows whose columns are not all readable: reported, not checked
                    _report_unreadable(report, ahead.goal_set.path, split, unreadable, found)
                    lane.submit(_side_checks, manifest, feed, split, row0, row_stop, stored, chunk, unreadable)
                    if n_rows:
                        summary.add(split, fresh.columns[split], fresh.keys[split])
                    cursor[split] = row_stop
                    continue
                seen = {}
                check_rows(plan, chunk, stored, split, report, row0, seen)
                lane.submit(_side_checks, manifest, feed, split, row0, row_stop, stored, chunk)
                if n_rows:
                    _compare(fresh.columns[split], stored, split, row0, report, seen)
                    summary.add(split, fresh.columns[split], fresh.keys[split])
                cursor[split] = row_stop
            if progress is not None:
                progress(int(plan.lengths[first_ep:stop_ep].sum()), plan.total_transitions)
    finally:
        chunks.close()
    return cursor


def _compare(fresh: dict, stored: dict, split: str, row0: int, report: VerifyReport, seen=None) -> None:
    """Re-derived rows against stored rows, column by column.

    The observation, action and next_observation columns come as row gathers of the logged
    arrays; when one takes the very rows :func:`check_rows` compared (``seen``: same array,
    same row index), the rows that differ are the ones found there, else they are gathered.
    """
    for name, value in stored.items():
        column = fresh[name]
        known = (seen or {}).get(name)
        if (isinstance(column, RowGather) and known is not None and column.source is known[0]
                and np.array_equal(column.index, known[1])):
            bad = known[2]
        else:
            ref = np.asarray(column).astype(value.dtype, copy=False)
            bad = _rows_differ(value.reshape(len(value), -1), ref.reshape(len(ref), -1))
        if bad.any():
            row = _first(bad)
            report.fail(f"{split} row {row0 + row} ({_row_text(stored, row)}): {name} differs from what the recipe "
                        f"and seed produce")
