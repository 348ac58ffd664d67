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
   the seal; the latter must agree with the root attribute);
6. an audit that shares no code with the builder (:mod:`goalkit.audit`, docs/audit.md): every
   row against the documented rules, and the draws against their documented laws.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from goalkit.errors import DatasetError, GoalkitError
from goalkit.logs.episodes import chunk_bounds
from goalkit.relabel.strategies import strategy_names
from goalkit.reward import score
from goalkit.write.format import SPLIT_CODES, SPLITS
from goalkit.write.seal import stored_strategy_codes


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
    code = SPLIT_CODES[split_name]
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
    for name, ref in score(plan.recipe.reward, achieved, cols["goal"], cols.get("goal_mask")).columns().items():
        diff = cols[name] != ref
        if diff.any():
            i = _first(diff)
            report.fail(f"{split_name} row {row0 + i} ({_row_text(cols, i)}): {name} {cols[name][i]!r} does not "
                        f"recompute from the reward rule (expected {ref[i]!r})")


def _strategy_code_problems(file) -> list[str]:
    """The strategy columns' own code tables (when stored) against the strategy table."""
    table = strategy_names()
    out = []
    for split in SPLITS:
        if "strategy" not in file[split]:
            continue
        stored = stored_strategy_codes(file[split]["strategy"], f"{split}/strategy")
        wrong = sorted(c for c, name in (stored or {}).items() if table.get(c) != name)
        if wrong:
            out.append(f"{split}/strategy: attribute codes names code {wrong[0]} "
                       f"{stored[wrong[0]]!r}, the strategy table calls it {table.get(wrong[0])!r}")
    return out


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


def verify_set(path, max_failures: int = 20, progress=None, audit: bool = True) -> VerifyReport:
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
    from goalkit.write.rederive import (as_stored, check_columns, differences, provenance_differences,
                                        source_entries, source_problem, stored_recipe)
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
        for message in _strategy_code_problems(gs.file):
            report.fail(message)
        # 1. source files
        entries = source_entries(gs)
        digests = {}
        for entry in entries:
            problem = source_problem(entry, digests)
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
        if not check_columns(gs, plan, split_rows(plan), report):
            return report
        # 3. manifest
        for message in gs.check_manifest():
            report.fail(message)
        report.checked["columns"] = len(gs.manifest)
        # 4 + 5. rows, checked and re-derived; the summary re-derived alongside
        gpt = recipe.mixture.goals_per_transition
        summary = SummaryBuilder(strategy_names(recipe.mixture), plan.total_transitions * gpt, recipe.seed,
                                 rule=recipe.reward)
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
        # 5. summary and provenance, re-derived
        for message in differences(as_stored(final_summary(summary, plan, source)), gs.summary, "summary"):
            report.fail(message)
        for message in provenance_differences(gs, plan, source, digests):
            report.fail(message)
    if audit:  # 6. rules and laws re-stated independently of the builder (docs/audit.md)
        from goalkit.audit import audit_into

        audit_into(path, report)
    return report


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
