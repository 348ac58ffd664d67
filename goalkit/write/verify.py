"""Verify a built set against its source logs, trusting nothing stored in it.

Checks, in order:

0. the file holds what a set holds and nothing else (attributes, groups, columns, each column as
   long as its split's ``rows`` attribute, the manifest listing exactly the stored columns) and
   its seal matches (format version 2; see :mod:`goalkit.write.seal`);
1. the source log files (regular files only) still have the checksums recorded at build time;
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
   the seal; the latter must agree with the root attribute).
"""

from __future__ import annotations

import json
import os
import stat
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np

from goalkit.errors import DatasetError, GoalkitError
from goalkit.logs.episodes import chunk_bounds
from goalkit.write.format import SPLITS
from goalkit.write.provenance import file_digest


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


def _row_text(cols, i) -> str:
    return (f"episode {int(cols['source_episode'][i])} step {int(cols['source_step'][i])} "
            f"slot {int(cols['slot'][i])}")


def _first(mask) -> int:
    return int(np.flatnonzero(mask)[0])


def check_rows(plan, chunk, cols, split_name, report, row0) -> None:
    """Check stored rows ``cols`` of one chunk against the logs and the rules (no re-derivation)."""
    from goalkit.write.rules import check_goal_rules

    n = len(cols["source_episode"])
    if n == 0:
        return
    gd = np.dtype(plan.recipe.goal.dtype)
    src_ep, t = cols["source_episode"], cols["source_step"]
    if not np.isin(src_ep, chunk.episode_ids).all():
        report.fail(f"{split_name} row {row0}: source episodes outside the logs' chunk")
        return
    pos = chunk.position_of(src_ep)
    lengths = chunk.lengths[pos]
    bad = (t < 0) | (t >= lengths)
    if bad.any():
        i = _first(bad)
        report.fail(f"{split_name} row {row0 + i} ({_row_text(cols, i)}): step outside the episode "
                    f"(0 .. {int(lengths[i]) - 1})")
        return
    cur = chunk.state_row(pos, t)
    trans = chunk.offsets[pos] + t
    code = {"train": 0, "validation": 1}[split_name]
    gpos_src = plan.positions(src_ep)
    wrong_split = plan.splits[gpos_src] != code
    if wrong_split.any():
        i = _first(wrong_split)
        report.fail(f"{split_name} row {row0 + i} ({_row_text(cols, i)}): the episode belongs to the other split")
    if "observation" in cols:
        for name, ref in (("observation", chunk.observations[cur]), ("action", chunk.actions[trans]),
                          ("next_observation", chunk.observations[cur + 1])):
            diff = np.any(np.asarray(cols[name]).reshape(n, -1) != np.asarray(ref, dtype=cols[name].dtype).reshape(n, -1), axis=1)
            if diff.any():
                i = _first(diff)
                report.fail(f"{split_name} row {row0 + i} ({_row_text(cols, i)}): {name} is not the logged value")
    phi = plan.goal_map(chunk, np.arange(chunk.observations.shape[0])).astype(gd)
    achieved = phi[cur + 1]
    if "reached_goal" in cols:
        diff = np.any(cols["reached_goal"] != achieved, axis=1)
        if diff.any():
            i = _first(diff)
            report.fail(f"{split_name} row {row0 + i} ({_row_text(cols, i)}): reached_goal is not phi(s_t+1)")
    # goals: phi at the recorded goal address, from the logs
    ge, gs = cols["goal_episode"], cols["goal_step"]
    internal = ge >= 0
    if internal.any():
        known = np.isin(ge[internal], plan.episode_ids)
        if not known.all():
            i = _first(internal) if known.all() else np.flatnonzero(internal)[_first(~known)]
            report.fail(f"{split_name} row {row0 + i} ({_row_text(cols, i)}): goal episode "
                        f"{int(ge[i])} is not in the logs")
            return
        gpos = plan.positions(ge[internal])
        glen = plan.lengths[gpos]
        out = (gs[internal] < 0) | (gs[internal] > glen)
        if out.any():
            i = np.flatnonzero(internal)[_first(out)]
            report.fail(f"{split_name} row {row0 + i} ({_row_text(cols, i)}): goal step {int(gs[i])} outside "
                        f"episode {int(ge[i])}")
            return
        crosses = plan.splits[gpos] != code
        if crosses.any():
            i = np.flatnonzero(internal)[_first(crosses)]
            report.fail(f"{split_name} row {row0 + i} ({_row_text(cols, i)}): the goal comes from episode "
                        f"{int(ge[i])} of the other split")
        expect = _goal_at(plan, chunk, phi, ge[internal], gs[internal]).astype(gd)
        diff = np.any(cols["goal"][internal] != expect, axis=1)
        if diff.any():
            i = np.flatnonzero(internal)[_first(diff)]
            report.fail(f"{split_name} row {row0 + i} ({_row_text(cols, i)}): goal is not phi of episode "
                        f"{int(ge[i])} step {int(gs[i])}")
    for message, mask in check_goal_rules(cols, lengths, plan.lengths[plan.positions(np.where(internal, ge, src_ep))]):
        if mask.any():
            i = _first(mask)
            report.fail(f"{split_name} row {row0 + i} ({_row_text(cols, i)}): {message}")
    from goalkit.write.joined_checks import check_joined

    check_joined(plan, chunk, cols, phi, pos, split_name, report, row0, _row_text)
    rule = plan.recipe.reward
    d = rule.distance(achieved.astype(np.float64), cols["goal"].astype(np.float64))
    for name, ref in (("goal_distance", d.astype(np.float32)), ("reward", rule.reward_from(d)),
                      ("reached", rule.reached_from(d).astype(np.uint8)),
                      ("terminal", (rule.reached_from(d) & rule.end_on_reach).astype(np.uint8))):
        diff = cols[name] != ref
        if diff.any():
            i = _first(diff)
            report.fail(f"{split_name} row {row0 + i} ({_row_text(cols, i)}): {name} {cols[name][i]!r} does not "
                        f"recompute from the reward rule (expected {ref[i]!r})")


def _goal_at(plan, chunk, phi_chunk, episodes, steps) -> np.ndarray:
    """phi at (episode id, step), from the chunk when the episode is in it, else from the logs."""
    out = np.empty((len(episodes), phi_chunk.shape[1]), dtype=phi_chunk.dtype)
    inside = np.isin(episodes, chunk.episode_ids)
    if inside.any():
        p = chunk.position_of(episodes[inside])
        out[inside] = phi_chunk[chunk.state_row(p, steps[inside])]
    if (~inside).any():
        if plan.goal_table is None:
            raise RuntimeError("goal table needed for goals from other chunks")
        out[~inside] = plan.goal_table[plan.global_state_rows(episodes[~inside], steps[~inside])]
    return out


def verify_set(path, max_failures: int = 20, progress=None) -> VerifyReport:
    """Verify the set at ``path``; see the module docstring for what is checked.

    Parameters
    ----------
    path : str or Path
    max_failures : int
        Stop collecting messages after this many.
    progress : callable, optional
        Called as ``progress(transitions_done_in_chunk, total_transitions)`` after each chunk.

    Returns
    -------
    VerifyReport

    Raises
    ------
    DatasetError
        When the file cannot be read as a set (naming the file and the key).
    """
    from goalkit.pipeline.build import chunk_transitions, final_summary
    from goalkit.pipeline.chunk import relabel_chunk
    from goalkit.pipeline.plan import make_plan, split_rows, strategy_names
    from goalkit.pipeline.summary import SummaryBuilder
    from goalkit.write.reader import GoalSet
    from goalkit.write.seal import check_layout, check_seal

    report = VerifyReport(max_failures=max_failures)
    with GoalSet(path) as gs:
        # 0. what is stored: attributes, groups and columns as a set has them; the seal
        for message in check_layout(gs.file, gs.path, gs.stored) + check_seal(gs.file, gs.stored):
            report.fail(message)
        report.checked["sealed"] = gs.stored.seal is not None
        report.checked["format_version"] = gs.stored.version
        if not report.ok:
            return report
        # 1. source files
        entries = source_entries(gs)
        digests = {}
        for entry in entries:
            problem = _source_problem(entry, digests)
            if problem:
                report.fail(f"source file {entry['path']}: {problem}")
        report.checked["source_files"] = len(gs.provenance.get("log_files", []))
        if not report.ok:
            return report
        # 2. the recipe with the set's own seed; the columns and row counts it produces (before
        #    any column is read, so a huge declared column is never read)
        recipe = stored_recipe(gs, report)
        if recipe is None:
            return report
        try:
            plan, source = make_plan(recipe)
        except GoalkitError as exc:
            raise DatasetError(f"cannot reopen what this set was built from: {exc}", file=gs.path) from None
        if not _check_shape(gs, plan, split_rows(plan), report):
            return report
        # 3. manifest
        for message in gs.check_manifest():
            report.fail(message)
        report.checked["columns"] = len(gs.manifest)
        # 4 + 5. rows, checked and re-derived; the summary re-derived alongside
        gpt = recipe.mixture.goals_per_transition
        summary = SummaryBuilder(strategy_names(recipe.mixture), plan.total_transitions * gpt, recipe.seed)
        cursor = {s: 0 for s in SPLITS}
        total = {s: gs.rows(s) for s in SPLITS}
        stored_names = {s: gs.columns(s) for s in SPLITS}
        for a, b in chunk_bounds(plan.lengths, chunk_transitions(plan)):
            chunk = source.read(a, b)
            fresh = relabel_chunk(plan, chunk)
            for s in SPLITS:
                n = len(fresh.keys.get(s, ()))
                lo, hi = cursor[s], cursor[s] + n
                if hi > total[s]:
                    report.fail(f"{s}: fewer rows stored ({total[s]}) than the recipe produces")
                    return report
                stored = gs.read(s, stored_names[s], lo, hi, resolve=False)
                check_rows(plan, chunk, stored, s, report, lo)
                if n:
                    _compare(fresh.columns[s], stored, s, lo, report)
                    summary.add(s, fresh.columns[s], fresh.keys[s])
                cursor[s] = hi
            if progress is not None:
                progress(int(plan.lengths[a:b].sum()), plan.total_transitions)
        for s in SPLITS:
            if cursor[s] != total[s]:
                report.fail(f"{s}: {total[s]} rows stored, the recipe produces {cursor[s]}")
        report.checked["rows"] = {s: total[s] for s in SPLITS}
        report.checked["episodes"] = int(len(plan.episode_ids))
        # 6. summary and provenance, re-derived
        for message in differences(as_stored(final_summary(summary, plan, source)), gs.summary, "summary"):
            report.fail(message)
        for message in _provenance_differences(gs, plan, source, digests):
            report.fail(message)
    return report


def source_entries(gs) -> list:
    """The file entries of a set's provenance (logs, embedding, library), type-checked.

    Raises
    ------
    DatasetError
        When an entry is not ``{"path": str, "bytes": int, "sha256": str}``.
    """
    prov = gs.provenance
    library = prov.get("library") or {}
    groups = [("log_files", prov.get("log_files", [])), ("embedding_files", prov.get("embedding_files", [])),
              ("library.files", library.get("files", []) if isinstance(library, dict) else None)]
    out = []
    for key, entries in groups:
        if not isinstance(entries, list):
            raise DatasetError("expected a list of file entries", file=gs.path, key=f"provenance.{key}")
        for e in entries:
            if not (isinstance(e, dict) and isinstance(e.get("path"), str) and isinstance(e.get("sha256"), str)
                    and isinstance(e.get("bytes"), int) and not isinstance(e.get("bytes"), bool)):
                raise DatasetError('expected entries {"path": text, "bytes": number, "sha256": text}',
                                   file=gs.path, key=f"provenance.{key}")
            out.append(e)
    return out


def _source_problem(entry: dict, digests: dict):
    """Why a source file no longer matches its entry (None when it does); fills ``digests``.

    Only regular files are read (a device or a FIFO named in a crafted set would never end).
    """
    path = entry["path"]
    try:
        info = os.stat(path)
    except OSError as exc:
        return f"cannot be read ({exc.strerror})"
    if not stat.S_ISREG(info.st_mode):
        return "not a regular file (a device, FIFO or folder); it is not read"
    if info.st_size != entry["bytes"]:
        return f"changed since the build (size {info.st_size} bytes, recorded {entry['bytes']})"
    try:
        digest = file_digest(path)
    except OSError as exc:
        return f"cannot be read ({exc.strerror})"
    digests[path] = digest
    if digest != entry["sha256"]:
        return "changed since the build (checksum differs)"
    return None


def stored_recipe(gs, report):
    """The recipe stored in a set, with the set's own seed; None (and failures) when unusable."""
    from goalkit.write.resolve import recipe_of

    recipe = recipe_of(gs)
    recipe = replace(recipe, seed=gs.seed)
    if recipe.output.mode != gs.mode:
        report.fail(f"mode attribute is {gs.mode!r}, the stored recipe builds {recipe.output.mode!r}")
    paths = [("provenance.logs_path", recipe.logs_path, True), ("provenance.layout_path", recipe.layout_path, False),
             ("recipe goal.embedding", recipe.goal.embedding, False),
             ("recipe library", getattr(recipe.mixture, "library", None), False)]
    for key, p, folder_ok in paths:
        if p is None:
            continue
        try:
            info = os.stat(p)
        except OSError:
            continue  # opening it reports the missing file with its own message
        if not (stat.S_ISREG(info.st_mode) or (folder_ok and stat.S_ISDIR(info.st_mode))):
            report.fail(f"{key} {p}: not a regular file (a device or FIFO); it is not read")
    return recipe if report.ok else None


def _check_shape(gs, plan, rows_expected: dict, report) -> bool:
    """Stored columns, dtypes, shapes and split attributes against what the recipe produces."""
    expected = plan.columns
    for s in SPLITS:
        stored = set(gs.file[s])
        missing = [n for n in expected if n not in stored]
        extra = sorted(stored - set(expected))
        if missing:
            report.fail(f"{s}: columns the recipe produces are missing: {', '.join(missing)}")
        if extra:
            report.fail(f"{s}: columns the recipe does not produce: {', '.join(extra)}")
        for name, (dtype, shape) in expected.items():
            if name not in stored:
                continue
            ds = gs.file[s][name]
            if ds.dtype != np.dtype(dtype) or tuple(ds.shape[1:]) != tuple(shape):
                raise DatasetError(f"column of dtype {ds.dtype} and row shape {tuple(ds.shape[1:])}, expected "
                                   f"{np.dtype(dtype)} and {tuple(shape)}", file=gs.path, key=f"{s}/{name}")
        out = plan.recipe.output
        for name in sorted(stored & set(expected)):
            ds = gs.file[s][name]
            chunk = (min(out.chunk_rows, ds.shape[0]) if ds.shape[0] else out.chunk_rows)
            if (ds.chunks or (None,))[0] != chunk or (ds.compression or "none") != out.compression:
                report.fail(f"{s}/{name}: stored in chunks of {(ds.chunks or (None,))[0]} rows with "
                            f"{ds.compression or 'no'} compression, the recipe writes {chunk} rows with "
                            f"{out.compression}")
                break
        if gs.rows(s) != rows_expected[s]:
            report.fail(f"{s}: rows attribute is {gs.rows(s)}, the recipe produces {rows_expected[s]} rows")
        episodes = int(np.sum(plan.splits == SPLITS.index(s)))
        stored_episodes = int(gs.file[s].attrs["episodes"])
        if stored_episodes != episodes:
            report.fail(f"{s}: episodes attribute is {stored_episodes}, the recipe puts {episodes} episodes there")
    return report.ok


def _provenance_differences(gs, plan, source, digests) -> list:
    """The stored provenance against the one re-derived from the recipe and the logs."""
    from goalkit.pipeline.build import provenance

    log_files = []
    for f in source.files:
        resolved = str(Path(f).resolve())
        digest = digests.get(resolved) or file_digest(f)
        log_files.append({"path": resolved, "bytes": os.stat(f).st_size, "sha256": digest})
    fresh = as_stored(provenance(plan, source, log_files=log_files))
    stored = dict(gs.provenance)
    out = []
    # recorded, not re-derivable: the goalkit that built the set (must agree with the attribute) and
    # where the recipe was read from (the base of its relative paths; covered by the seal)
    if stored.get("goalkit_version") != gs.stored.goalkit_version:
        out.append(f"provenance.goalkit_version {stored.get('goalkit_version')!r} differs from the "
                   f"goalkit_version attribute {gs.stored.goalkit_version!r}")
    if not isinstance(stored.get("recipe_file", ""), str):
        out.append("provenance.recipe_file: expected text")
    for key in ("goalkit_version", "recipe_file"):
        fresh.pop(key, None)
        stored.pop(key, None)
    return out + differences(fresh, stored, "provenance")


def as_stored(record: dict) -> dict:
    """``record`` as it reads back from the set's JSON attribute (numpy scalars, tuples, int keys)."""
    from goalkit.write.writer import _json_default

    return json.loads(json.dumps(record, sort_keys=True, default=_json_default))


def differences(expected, stored, where: str, limit: int = 5) -> list:
    """Messages for the leaves where ``stored`` differs from ``expected`` (nested dicts and lists)."""
    out = []

    def walk(e, s, at):
        if len(out) >= limit:
            return
        if isinstance(e, dict) and isinstance(s, dict):
            for k in sorted(set(e) | set(s), key=str):
                if k not in s:
                    out.append(f"{at}.{k} is missing (re-derived: {_short(e[k])})")
                elif k not in e:
                    out.append(f"{at}.{k} is stored but not re-derived (stored: {_short(s[k])})")
                else:
                    walk(e[k], s[k], f"{at}.{k}")
        elif isinstance(e, list) and isinstance(s, list) and len(e) == len(s):
            for i, (a, b) in enumerate(zip(e, s)):
                walk(a, b, f"{at}[{i}]")
        elif type(e) is not type(s) or e != s:
            if isinstance(e, float) and isinstance(s, float) and np.isnan(e) and np.isnan(s):
                return
            out.append(f"{at} is {_short(s)}, re-derived {_short(e)}")

    walk(expected, stored, where)
    return out


def _short(value, width: int = 60) -> str:
    text = repr(value)
    return text if len(text) <= width else text[:width - 3] + "..."


def _compare(fresh: dict, stored: dict, split: str, row0: int, report: VerifyReport) -> None:
    """Re-derived rows against stored rows, column by column."""
    for name, value in stored.items():
        ref = np.asarray(fresh[name]).astype(value.dtype)
        diff = value.reshape(len(value), -1) != ref.reshape(len(ref), -1)
        bad = np.any(diff, axis=1)
        if bad.any():
            i = _first(bad)
            report.fail(f"{split} row {row0 + i} ({_row_text(stored, i)}): {name} differs from what the recipe "
                        f"and seed produce")
