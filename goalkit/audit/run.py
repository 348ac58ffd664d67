"""Run the audit on a built set: read it with h5py, reopen its logs, check rows, test the draws."""

from __future__ import annotations

import json
import os
from dataclasses import dataclass, field, replace
from pathlib import Path
from types import SimpleNamespace

import numpy as np

from goalkit.audit.graphcheck import GraphAudit
from goalkit.audit.headaudit import HeadAudit
from goalkit.audit.laws import geometric_law, uniform_law
from goalkit.audit.maskrules import MaskAudit
from goalkit.audit.recipe_text import CODE_NAMES, parse_audit_recipe
from goalkit.audit.rowrules import (EPISODE, FUTURE, GEOMETRIC, NEAR_MISS, NEIGHBOUR, ORIGINAL, OTHER,
                                    address_rules, among, label_rules, reward_rules)
from goalkit.audit.stattests import (FINE_BINS, binom_check, count_bound_check, grid_chi2_check, holm,
                                     preload_scipy, share_power, uniform_chi2_check)
from goalkit.config import parse_toml
from goalkit.errors import DatasetError, GoalkitError
from goalkit.logs import open_logs
from goalkit.logs.episodes import concat_episodes, consecutive_runs
from goalkit.logs.multi import open_sources, specs_from_provenance
from goalkit.logs.layout import parse_layout
from goalkit.pipeline.goal import make_goal_map
from goalkit.write.format import open_set_file
from goalkit.write.relocate import Relocation, locate

#: Family error of the statistical checks: a correct set fails any of them with at most this chance.
ALPHA = 1e-6
#: Transitions per block of rows read at once (full audit) and per sampled block (``sample``).
BLOCK_TRANSITIONS = 8192
SAMPLE_BLOCK_TRANSITIONS = 256   # at least; else one storage chunk of rows
#: Salt mixed with the set's seed for the PIT jitter (a fixed, documented generator).
JITTER_SALT = 0x61756469

INDEX = ("source_episode", "source_step", "slot", "strategy", "goal_episode", "goal_step", "hop_episode",
         "hop_step", "join_step", "steps_to_goal", "goal", "goal_distance", "reward", "reached", "terminal")
#: The training-label columns (docs/dataset.md); audited where stored (older sets lack them).
LABELS = ("discount_weight", "return_to_goal", "bootstrap_mask")
SPLITS = ("train", "validation")
#: The environment's end flags: set column -> (layout role, EpisodeSet attribute). Stated here,
#: apart from the builder's row schema: each column is the log's flag of transition t.
END_FLAGS = {"termination": ("termination", "terminations"), "time_limit": ("time_limit", "time_limits")}


@dataclass
class AuditReport:
    """Outcome of :func:`audit_set`.

    Attributes
    ----------
    ok : bool
        No row rule was broken and no statistical check failed.
    failures : list of str
        One line per broken row rule (with its first row) and per failed check.
    checks : list of Check
        Every statistical check with statistic, p-value and Holm threshold.
    rows : dict
        Rows audited per split.
    seed : int
        The set's stored seed (seeds the PIT jitter and the sample).
    sample : int or None
        Rows asked for with ``sample``; None for a full audit.
    share_shift : float
        Smallest upward shift of the smallest strategy share detected with 90% power at the
        audited row count (see :func:`goalkit.audit.stattests.share_power`).
    """

    ok: bool = True
    failures: list = field(default_factory=list)
    checks: list = field(default_factory=list)
    rows: dict = field(default_factory=dict)
    seed: int = 0
    sample: int | None = None
    alpha: float = ALPHA
    share_shift: float = float("nan")
    rule_violations: dict = field(default_factory=dict)

    def as_dict(self) -> dict:
        return {"ok": self.ok, "failures": list(self.failures), "checks": [c.as_dict() for c in self.checks],
                "rows": dict(self.rows), "seed": self.seed, "sample": self.sample, "alpha": self.alpha,
                "share_shift_90": self.share_shift, "rule_violations": dict(self.rule_violations)}


class _Runs:
    """Runs of equal values of an int array (a set's rows come grouped by episode): a function
    that maps each value on its own is computed once per run (``f(values)`` ==
    ``spread(f(runs.values))``)."""

    def __init__(self, values):
        values = np.asarray(values)
        n = len(values)
        starts = np.flatnonzero(values[1:] != values[:-1]) + 1 if n > 1 else np.zeros(0, np.int64)
        starts = np.concatenate((np.zeros(min(n, 1), np.int64), starts))
        self.values = values[starts]
        self.lengths = np.diff(np.append(starts, n))

    def spread(self, per_run) -> np.ndarray:
        return np.repeat(per_run, self.lengths, axis=0)


def _differing_rows(ne) -> np.ndarray:
    """``ne.any(axis=1)`` of a 2-d mask, looked at as a whole first (cheap when nothing differs)."""
    if ne.ndim == 2 and not ne.any():
        return np.zeros(len(ne), bool)
    return ne.any(axis=1)


def _same_log(opened, where, layout, skip_bad_episodes) -> bool:
    """Whether ``opened`` (a source verify opened) is the single log ``where`` read with ``layout``.

    Only then may the audit use it instead of opening the file again: the same file (device and
    inode), the layout parsed from the provenance's own text (equal field by field), the same
    skip policy, and no episode skipped.
    """
    if opened is None or layout is None or getattr(opened, "source_names", None) is not None:
        return False
    try:
        same_file = os.path.samefile(opened.path, where)
    except (OSError, TypeError):
        return False
    return (same_file and getattr(opened, "layout", None) == layout and not getattr(opened, "skipped", [])
            and bool(getattr(opened, "skip_bad_episodes", None)) == bool(skip_bad_episodes))


class _Logs:
    """The set's logs reopened with its stored layout, and its goal map."""

    def __init__(self, prov: dict, rc, path, relocation: Relocation, opened=None):
        layout = None
        where = relocation.path   # the files where they are now (recorded paths if unmoved)
        if prov.get("layout_text"):
            layout = parse_layout(parse_toml(prov["layout_text"], f"{path}:layout", DatasetError), f"{path}:layout")
        if "sources" in prov:    # several files or sources: as read at build time
            specs = specs_from_provenance(prov["sources"], DatasetError, file=path)
            specs = tuple(replace(s, entries=tuple(str(where(e, path)) for e in s.entries)) for s in specs)
            self.source = open_sources(specs, named=rc.named_sources, file=path)
        elif _same_log(opened, where(prov["logs_path"], path), layout, rc.skip_bad_episodes):
            self.source = opened   # verify opened this very file with this layout already
        else:
            self.source = open_logs(where(prov["logs_path"], path), layout, skip_bad_episodes=rc.skip_bad_episodes)
        self.ids = np.asarray(self.source.episode_ids, dtype=np.int64)
        self.lengths = np.asarray(self.source.lengths, dtype=np.int64)
        # goal rows per transition of each episode: its source's own count, else [relabel]'s
        self.codes = None
        self.goals = np.full(len(self.ids), rc.goals_per_transition, np.int64)
        if getattr(self.source, "source_names", None) is not None and rc.named_sources:
            self.codes = np.asarray(self.source.source_of(self.ids), dtype=np.int64)
            per = np.array([rc.source_goals.get(n, rc.goals_per_transition) for n in self.source.source_names],
                           dtype=np.int64)
            self.goals = per[self.codes]
        base = Path(prov["recipe_file"]).parent if prov.get("recipe_file") else Path.cwd()
        goal = rc.goal
        emb = goal.get("embedding")
        spec = SimpleNamespace(fields=tuple(goal.get("fields", ())), indices=tuple(goal.get("indices", ())),
                               embedding=where(base / emb, path) if emb else None)
        first = self.source.read(0, 1)
        self.goal_map = make_goal_map(spec, self.source, first.observations.shape[1])
        self.goal_dtype = np.dtype(goal.get("dtype", "float32"))
        self.field_widths = [(n, first.fields[n][1] - first.fields[n][0]) for n in spec.fields
                             if n in first.fields]
        # the stored dtypes the recipe asks for, else the logs' own (several files: their common type)
        obs = np.dtype(getattr(self.source, "obs_dtype", first.observations.dtype))
        act = np.dtype(getattr(self.source, "action_dtype", first.actions.dtype))
        self.stored_dtypes = {"observation": np.dtype(rc.observation_dtype) if rc.observation_dtype else obs,
                              "action": np.dtype(rc.action_dtype) if rc.action_dtype else act,
                              "goal": self.goal_dtype, "reached_goal": self.goal_dtype}
        self.stored_dtypes["next_observation"] = self.stored_dtypes["observation"]

    def known(self, episodes) -> np.ndarray:
        runs = _Runs(episodes)
        pos = np.minimum(np.searchsorted(self.ids, runs.values), len(self.ids) - 1)
        return runs.spread(self.ids[pos] == runs.values)

    def length_of(self, episodes) -> np.ndarray:
        """Transition count per episode id (-1 for ids not in the logs)."""
        runs = _Runs(np.asarray(episodes, dtype=np.int64))
        pos = np.minimum(np.searchsorted(self.ids, runs.values), len(self.ids) - 1)
        return runs.spread(np.where(self.ids[pos] == runs.values, self.lengths[pos], -1))

    def position(self, episodes, runs=None) -> np.ndarray:
        """``searchsorted(ids, episodes)``, once per run of one episode."""
        runs = _Runs(episodes) if runs is None else runs
        return runs.spread(np.searchsorted(self.ids, runs.values))

    def _phi_at(self, chunk, local, rows) -> np.ndarray:
        """phi of the state rows ``rows`` of ``chunk`` (of episode positions ``local``), goal dtype.

        The goal map runs once over every state of the episodes touched, not once per goal row
        (a goal map gives the same rows whatever rows it is asked for), then rows are picked.
        """
        runs = _Runs(local)
        touched = np.unique(runs.values)
        first = chunk.offsets[touched] + touched            # each touched episode's first state row
        count = chunk.lengths[touched] + 1
        at = np.cumsum(count) - count                       # where its states start in the table
        states = np.repeat(first - at, count) + np.arange(int(count.sum()), dtype=np.int64)
        table = np.asarray(self.goal_map(chunk, states)).astype(self.goal_dtype)
        k = np.searchsorted(touched, runs.values)
        return np.take(table, runs.spread(at[k] - first[k]) + rows, axis=0)

    def end_flag_columns(self) -> list:
        """The end-flag columns a set of these logs must have (the flags its layout maps)."""
        keys = self.source.layout.keys
        return [col for col, (role, _) in END_FLAGS.items() if getattr(keys, role) is not None]

    def achieved_and_task_goal(self, episodes, steps, flags=(), materials=False, chunk=None, task_rows=None):
        """phi(s_t+1) (goal dtype), the log's task goal (or None), end flags and task ids of each (episode, t).

        Returns ``(achieved, task, flag_values, task_ids)``: ``flag_values`` maps each of ``flags`` (end-flag
        column names) to the log's own flag of each (episode, t), as uint8; ``task_ids`` is the
        task id of each row's episode (-1: none). With ``materials``, ``flag_values`` also holds the
        logged ``observation`` (s_t), ``action`` and ``next_observation`` in the logs' dtypes. With
        ``task_rows`` (row numbers), the task goal is given for those rows only.
        """
        runs = _Runs(episodes)
        pos_runs = np.searchsorted(self.ids, runs.values)
        pos = runs.spread(pos_runs)
        need = np.unique(pos_runs)
        a, b = int(need[0]), int(need[-1]) + 1
        if chunk is not None and np.isin(self.ids[need], chunk.episode_ids).all():
            local = runs.spread(chunk.position_of(runs.values))   # the episodes verify read already
        elif 2 * need.size < b - a:   # scattered episodes (a block of the validation split): only those
            chunk = concat_episodes([self.source.read(int(need[i]), int(need[j - 1]) + 1)
                                     for i, j in consecutive_runs(need)])
            local = np.searchsorted(need, pos)
        else:
            chunk = self.source.read(a, b)
            local = pos - a
        cur = chunk.state_row(local, steps)
        achieved = self._phi_at(chunk, local, cur + 1)
        task = None
        if chunk.task_goals is not None:
            tg = np.asarray(chunk.task_goals)
            at = chunk.offsets[local] + steps
            task = np.take(tg.reshape(len(tg), -1), at if task_rows is None else at[task_rows], axis=0)
        values = {}
        if materials:   # the logged s_t, a_t, s_t+1 as the logs keep them (cast by the caller)
            trans = chunk.offsets[local] + steps
            values.update(observation=np.take(np.asarray(chunk.observations), cur, axis=0),
                          action=np.take(np.asarray(chunk.actions), trans, axis=0),
                          next_observation=np.take(np.asarray(chunk.observations), cur + 1, axis=0))
        for col in flags:
            logged = getattr(chunk, END_FLAGS[col][1])
            values[col] = None if logged is None else np.asarray(logged)[chunk.offsets[local] + steps].astype(np.uint8)
        task_ids = (np.full(len(local), -1, np.int64) if chunk.task_ids is None
                    else np.asarray(chunk.task_ids, dtype=np.int64)[local])
        return achieved, task, values, task_ids


class _Draws:
    """Accumulated statistics of the draws, merged over blocks."""

    def __init__(self):
        self.counts = np.zeros(256, np.int64)
        self.hist = {}
        self.ends = {}
        self.pairs_same_strategy = [0, {}]
        self.pairs_same_step = [0, {}]
        self.grid = np.zeros((10, 10), np.int64)

    @staticmethod
    def add(acc, hits, probs):
        """Add events to ``acc = [hits, {probability: events}]``."""
        acc[0] += int(np.count_nonzero(hits))
        values, counts = np.unique(np.asarray(probs, dtype=np.float64), return_counts=True)
        for v, c in zip(values.tolist(), counts.tolist()):
            acc[1][v] = acc[1].get(v, 0) + c

    def law(self, name, rows_law, mask=None):
        """Add a law evaluated at rows (those of ``mask``, or all of them when it is None)."""
        pit = rows_law.pit if mask is None else rows_law.pit[mask]
        ok = np.isfinite(pit)
        h = self.hist.setdefault(name, np.zeros(FINE_BINS, np.int64))
        h += np.bincount(np.minimum((pit[ok] * FINE_BINS).astype(np.int64), FINE_BINS - 1), minlength=FINE_BINS)
        for end, hit, p in (("low", rows_law.at_low, rows_law.p_low), ("high", rows_law.at_high, rows_law.p_high)):
            acc = self.ends.setdefault((name, end), [0, {}])
            if mask is None:
                self.add(acc, np.asarray(hit)[ok], np.broadcast_to(p, pit.shape)[ok])
            else:
                self.add(acc, np.asarray(hit)[mask][ok], np.broadcast_to(p, mask.shape)[mask][ok])


def audit_set(path, sample: int | None = None, alpha: float = ALPHA, *, logs_root=None,
              relocation: Relocation | None = None, opened=None) -> AuditReport:
    """Audit the set at ``path`` against the documented rules and laws (docs/audit.md).

    Parameters
    ----------
    path : str or Path
    sample : int, optional
        Audit at least this many rows, in blocks of whole transitions (about one storage chunk
        each) at positions drawn with the set's seed, instead of every row. Row positions do not depend on the draws, so every
        statistical check stays valid on the sample.
    alpha : float
        Family error of the statistical checks (Holm).
    logs_root : str or Path, optional
        The folder that now holds the logs, when they moved (:mod:`goalkit.write.relocate`).
    relocation : Relocation, optional
        Where the set's files were found already (verify passes its own; else looked for here).
    opened : LogSource, optional
        The log verify opened already; used instead of opening it again only when it is the
        same single file read with the provenance's layout (device and inode, equal layout,
        same skip policy, nothing skipped). Everything the audit checks is computed here.

    Returns
    -------
    AuditReport
    """
    path = Path(path)
    with open_set_file(path) as f:
        report, auditor = _prepare(f, path, sample, alpha, logs_root, relocation, opened)
        if auditor is not None:
            auditor.run()
    return report


def _prepare(f, path, sample, alpha, logs_root, relocation, opened):
    """The report and the auditor of the open set ``f`` (auditor None: rows not audited)."""
    if f.attrs.get("format") != "goalkit-goal-set":
        raise DatasetError("not a goalkit set", file=path, key="format")
    try:
        seed = int(f.attrs["seed"])   # the set's own seed (a --seed override is stored here)
        rc = parse_audit_recipe(str(f.attrs["recipe"]))
        prov = json.loads(f.attrs["provenance"])
    except (KeyError, ValueError, TypeError) as exc:  # tomllib and json errors are ValueErrors
        raise DatasetError(f"the audit cannot read the stored seed, recipe or provenance ({exc})",
                           file=path) from None
    report = AuditReport(seed=seed, sample=sample, alpha=alpha)
    missing = [f"{s}/{k}" for s in SPLITS for k in INDEX if s not in f or k not in f[s]]
    if missing:
        report.ok = False
        report.failures.append(f"column {missing[0]} is missing; rows not audited")
        return report, None
    stored_codes = prov.get("strategies")
    if stored_codes is not None and {int(k): v for k, v in stored_codes.items()} != CODE_NAMES:
        report.ok = False
        report.failures.append("strategy code table in the provenance differs from the documented one")
    if relocation is None:
        relocation = locate(path, prov, logs_root, strict=True)
    try:
        logs = _Logs(prov, rc, path, relocation, opened)
    except GoalkitError as exc:
        raise DatasetError(f"the audit cannot reopen the logs this set was built from: {exc}",
                           file=path) from None
    flags = logs.end_flag_columns()
    for s in SPLITS:
        if rc.named_sources != ("source" in f[s]):
            report.failures.append(f"column {s}/source is " + ("missing: the recipe names its sources"
                                   if rc.named_sources else "stored, but the recipe names no sources"))
        for col in END_FLAGS:
            if col in flags and col not in f[s]:
                report.failures.append(f"column {s}/{col} is missing: the layout maps the environment's "
                                       f"{END_FLAGS[col][0]} flag")
            elif col not in flags and col in f[s]:
                report.failures.append(f"column {s}/{col} is stored, but the layout maps no "
                                       f"{END_FLAGS[col][0]} flag")
        for col, dtype in logs.stored_dtypes.items():
            if col in f[s] and f[s][col].dtype != dtype:
                report.failures.append(f"column {s}/{col} is stored as {f[s][col].dtype}, expected {dtype} "
                                       f"(the recipe's dtype, else the logs')")
    auditor = _Auditor(f, rc, logs, report, seed, sample, alpha)
    try:
        auditor.summary_sources = json.loads(f.attrs["summary"]).get("sources")
    except (KeyError, ValueError, TypeError, AttributeError):
        auditor.summary_sources = None
    return report, auditor


class AuditFeed:
    """The audit of a whole set, fed the rows and log episodes verify has read already.

    verify reads each chunk of episodes from the logs and the chunk's stored rows of each split
    once; :meth:`add` audits those rows with them (the same rules, laws and jitter as
    :func:`audit_set`: the jitter of a row is addressed by its position, so the draws' PIT
    values are those of a run over the splits one after the other). Sets with goal heads or a
    ``[graph]`` table are audited by :func:`audit_set` after the replay instead
    (:attr:`fed` is False).
    """

    def __init__(self, path, relocation=None, opened=None):
        self.path = Path(path)
        self._file = open_set_file(self.path)
        try:
            self.report, self._auditor = _prepare(self._file, self.path, None, ALPHA, None, relocation, opened)
        except BaseException:
            self._file.close()
            raise
        a = self._auditor
        if a is not None:   # scipy, for the tests at the end, loads while the replay starts
            preload_scipy()
        self.fed = a is not None and a.heads is None and a.graph is None
        if self.fed:
            try:
                a.start()
            except _Unreadable as exc:   # the rows' episodes are not known: nothing is audited
                a.not_audited(exc)
                self._auditor, self.fed = None, False
                return
            a.positional = True

    def add(self, split, a, b, stored: dict, chunk) -> None:
        """Audit rows ``a .. b - 1`` of ``split`` (whole transitions of the episodes of ``chunk``)."""
        if self.fed and b > a:
            self._auditor.block(split, a, b, self._auditor.counts[split], stored=stored, chunk=chunk)

    def unread(self, split, a, b) -> None:
        """Rows ``a .. b - 1`` of ``split`` that verify could not read (a stored chunk that does
        not decompress): not audited, and the audit says so (see :meth:`_Auditor.end`)."""
        if self.fed and b > a:
            self._auditor.unread.append((split, a, b))

    def add_stored(self, split, a, b) -> None:
        """Audit rows ``a .. b - 1`` of ``split``, read here (rows verify did not read)."""
        if self.fed:
            for start in range(a, b, BLOCK_TRANSITIONS):
                stop = min(b, start + BLOCK_TRANSITIONS)
                self._auditor.block(split, start, stop, self._auditor.counts[split])

    def finish(self) -> AuditReport:
        """Finish the audit (or run it whole when rows were not fed) and close the set."""
        try:
            if self._auditor is not None:
                if self.fed:
                    self._auditor.end()
                else:
                    self._auditor.run()
            return self.report
        finally:
            self.close()

    def close(self) -> None:
        self._file.close()


class _Window:
    """Rows ``w0 .. w1 - 1`` of one split's stored columns, each column read (so each of its
    chunks decompressed) once, on first use; stands for the split's HDF5 group in
    :meth:`_Auditor.block`: ``name in window``, ``window[name][a:b]`` with the split's row numbers.
    A column that cannot be read raises OSError at each use, as the dataset would."""

    def __init__(self, group, split, w0, w1):
        self.group, self.split, self.w0, self.w1 = group, split, w0, w1
        self.columns = {}

    def __contains__(self, name) -> bool:
        return name in self.group

    def __getitem__(self, name):
        return _WindowColumn(self, name)

    def rows(self, name, a, b):
        if not (self.w0 <= a <= b <= self.w1):
            return self.group[name][a:b]
        if name not in self.columns:
            self.columns[name] = self.group[name][self.w0:self.w1]
        return self.columns[name][a - self.w0:b - self.w0].copy()   # a block's own rows, as a read gives


class _WindowColumn:
    """One column of a :class:`_Window`, sliced like its dataset (``[a:b]`` only)."""

    def __init__(self, window, name):
        self.window, self.name = window, name

    def __getitem__(self, rows):
        if not isinstance(rows, slice) or rows.step not in (None, 1):
            return self.window.group[self.name][rows]
        return self.window.rows(self.name, rows.start or 0, rows.stop)


class _Unreadable(Exception):
    """A column the audit needs whole cannot be read (its text: split/column)."""


def _merged(ranges) -> list:
    """``(split, a, b)`` ranges in the splits' order, touching ranges of one split merged."""
    out = []
    for s, a, b in sorted(ranges, key=lambda r: (SPLITS.index(r[0]), r[1])):
        if out and out[-1][0] == s and out[-1][2] >= a:
            out[-1] = (s, out[-1][1], max(out[-1][2], b))
        else:
            out.append((s, a, b))
    return out


class _Auditor:
    def __init__(self, f, rc, logs, report, seed, sample, alpha):
        self.f, self.rc, self.logs, self.report = f, rc, logs, report
        self.sample, self.alpha, self.seed = sample, alpha, seed
        self.jitter = np.random.default_rng([seed, JITTER_SALT])
        self.draws = _Draws()
        self.violations = {}
        self.first = {}
        self.masks = None if rc.mask is None else MaskAudit(rc.mask, logs.goal_map.dim, logs.field_widths)
        self.graph = GraphAudit(logs, rc.graph) if rc.graph is not None else None
        self.summary_sources = None
        self.positional = False   # jitter addressed by row position (rows fed in another order)
        self.unread = []          # (split, first row, end row) of rows that could not be read
        self.heads = HeadAudit(rc, logs, self.draws, seed, self.masks) if rc.heads else None
        self.window = None        # the stored rows read around the block being audited (run())

    # ---- failures ------------------------------------------------------------------------
    def violated(self, rule, message, mask, split, row0, c):
        n = int(np.count_nonzero(mask))
        if n == 0:
            return
        self.violations[rule] = self.violations.get(rule, 0) + n
        i = int(np.flatnonzero(mask)[0])
        where = (SPLITS.index(split), row0 + i)   # the first in the splits' order, however rows were fed
        if rule not in self.first or where < self.first[rule][0]:
            self.first[rule] = (where, f"{split} row {row0 + i} (episode {int(c['source_episode'][i])} step "
                                       f"{int(c['source_step'][i])} slot {int(c['slot'][i])}): {message}")

    # ---- the run -------------------------------------------------------------------------
    def not_audited(self, exc) -> None:
        self.report.ok = False
        self.report.failures.append(f"column {exc} cannot be read (a stored chunk does not decompress); "
                                    f"rows not audited")

    def run(self):
        try:
            self.start()
        except _Unreadable as exc:
            self.not_audited(exc)
            return
        for s, a, b in self.blocks():
            self.window = self._window(s, a, b)
            try:
                self.block(s, a, b, self.counts[s])
            except OSError:   # a stored chunk that does not decompress: these rows are not audited
                self.unread.append((s, a, b))
        self.window = None
        self.end()

    def _window(self, split, a, b):
        """The :class:`_Window` of whole storage chunks holding rows ``a .. b - 1`` of ``split``
        (the current one while it does): blocks are smaller than a chunk, and reading each block's
        rows from HDF5 decompressed every chunk once per block."""
        w = self.window
        if w is not None and w.split == split and w.w0 <= a and b <= w.w1:
            return w
        grp = self.f[split]
        ds = grp["source_episode"]
        if not ds.chunks:
            return None
        step, rows = int(ds.chunks[0]), int(ds.shape[0])
        return _Window(grp, split, (a // step) * step, min(rows, -(-b // step) * step))

    def start(self):
        f = self.f
        members = {}
        for s in SPLITS:
            ep = f[s]["source_episode"]
            try:
                parts = [np.unique(ep[a:a + (1 << 22)]) for a in range(0, ep.shape[0], 1 << 22)]
            except OSError:
                raise _Unreadable(f"{s}/source_episode") from None
            members[s] = np.unique(np.concatenate(parts)) if parts else np.zeros(0, np.int64)
        self.members = members
        both = np.intersect1d(members["train"], members["validation"])
        if both.size:
            self.report.failures.append(f"episode {int(both[0])} has rows in both splits")
        unknown = np.setdiff1d(np.union1d(members["train"], members["validation"]), self.logs.ids)
        if unknown.size:
            self.report.failures.append(f"episode {int(unknown[0])} is not in the logs")
        self.counts = {s: np.zeros(len(self.logs.ids), np.int64) for s in SPLITS}
        self.report.rows = {s: 0 for s in SPLITS}
        self.split_start = {SPLITS[0]: 0, SPLITS[1]: int(f[SPLITS[0]]["source_episode"].shape[0])}

    def end(self):
        rc, counts, members = self.rc, self.counts, self.members
        for s, a, b in _merged(self.unread):
            self.report.failures.append(f"{s} rows {a} .. {b - 1} not audited: stored rows cannot be read (a stored "
                                        f"chunk does not decompress)")
        if self.sample is None and not self.unread:   # row counts: only when every row was read
            missing = np.setdiff1d(self.logs.ids[self.logs.goals > 0], np.union1d(members["train"], members["validation"]))
            if missing.size:
                self.report.failures.append(f"episode {int(missing[0])} of the logs has no rows")
            for s in SPLITS:
                pos = np.searchsorted(self.logs.ids, members[s][np.isin(members[s], self.logs.ids)])
                expect = self.logs.lengths[pos] * self.logs.goals[pos]
                bad = counts[s][pos] != expect
                if bad.any():
                    k = int(np.flatnonzero(bad)[0])
                    self.report.failures.append(
                        f"{s}: episode {int(self.logs.ids[pos[k]])} has {int(counts[s][pos[k]])} rows, expected "
                        f"T x goals_per_transition of its source = {int(expect[k])}")
            self.source_rows(counts)
        for rule, n in self.violations.items():
            self.report.failures.append(f"row rule '{rule}' broken by {n} rows; first: {self.first[rule][1]}")
        if self.graph is not None:
            self.report.failures.extend(self.graph.failures())
        self.report.rule_violations = dict(self.violations)
        self.report.checks = holm(self.checks(), self.alpha)
        for c in self.report.checks:
            if not c.passed:
                self.report.failures.append(f"check '{c.name}' failed: p = {c.p_value:.3g} <= {c.threshold:.3g} "
                                            f"({c.test}; {c.detail})")
        n = sum(self.report.rows.values())
        m = max(len(self.report.checks), 1)
        self.report.share_shift = share_power(n, min(rc.weights.values()), self.alpha / m) if n else float("nan")
        self.report.ok = not self.report.failures

    def source_rows(self, counts):
        """Rows per source and split: counted from the rows against T x the source's goal count.

        The expected numbers come from the logs and the recipe text alone; the stored summary's
        per-source rows (when the recipe names sources) must equal them too.
        """
        codes = self.logs.codes
        if codes is None:
            return
        stored = self.summary_sources
        names = list(getattr(self.logs.source, "source_names", []))
        for code, name in enumerate(names):
            mine = codes == code
            for s in SPLITS:
                counted = int(counts[s][mine].sum())
                in_split = mine & np.isin(self.logs.ids, self.members[s])
                expect = int((self.logs.lengths[in_split] * self.logs.goals[in_split]).sum())
                if counted != expect:
                    self.report.failures.append(f"source '{name}': {counted} {s} rows, expected {expect} "
                                                f"(T x its goals_per_transition over its {s} episodes)")
                got = ((stored or {}).get(name) or {}).get("rows", {}).get(s) if stored is not None else None
                if stored is not None and got != counted:
                    self.report.failures.append(f"source '{name}': the summary says {got} {s} rows, the set "
                                                f"holds {counted}")

    def blocks(self):
        g = int(self.logs.goals.max(initial=1)) or 1
        rows = {s: int(self.f[s]["source_episode"].shape[0]) for s in SPLITS}
        if self.sample is None:
            step = BLOCK_TRANSITIONS * g
            return [(s, a, min(a + step, rows[s])) for s in SPLITS for a in range(0, rows[s], step)]
        # blocks of about one storage chunk (whole transitions), so a sample decompresses little
        # more than it audits
        chunk = self.f["train"]["source_episode"].chunks or self.f["validation"]["source_episode"].chunks
        step = max(SAMPLE_BLOCK_TRANSITIONS, (chunk[0] if chunk else 0) // g) * g
        allb = [(s, a, min(a + step, rows[s])) for s in SPLITS for a in range(0, rows[s], step)]
        order = np.random.default_rng([self.seed, JITTER_SALT, 1]).permutation(len(allb))
        sizes = np.array([allb[i][2] - allb[i][1] for i in order.tolist()], dtype=np.int64)
        take = int(np.searchsorted(np.cumsum(sizes), int(self.sample))) + 1   # blocks until >= sample rows
        return [allb[i] for i in np.sort(order[:take]).tolist()]

    def block(self, split, a, b, counts, stored=None, chunk=None):
        """Audit rows ``a .. b - 1`` of ``split``; ``stored``: those rows already read (by column), and
        ``chunk``: the log episodes they come from, already read (else both are read here)."""
        rc, logs = self.rc, self.logs
        grp = self.f[split] if self.window is None else self.window

        def column(k):
            return stored[k] if stored is not None and k in stored else grp[k][a:b]

        c = {k: column(k) for k in INDEX + tuple(k for k in LABELS if k in grp)}
        flags = [col for col in logs.end_flag_columns() if col in grp]
        c.update({col: column(col) for col in flags})
        if "source" in grp and self.rc.named_sources:
            c["source"] = column("source")
        if self.masks is not None:
            if "goal_mask" not in grp:
                self.violated("goal_mask", "the recipe has a [mask] table but the set no goal_mask column",
                              np.ones(b - a, bool), split, a, c)
                return
            c["goal_mask"] = column("goal_mask")
        n = b - a
        if self.graph is not None:
            self.graph.add(split, a, c, grp["graph_steps"][a:b] if "graph_steps" in grp else None)
        if self.heads is not None:
            lacking = self.heads.missing(grp)
            if lacking:
                self.violated("head columns", f"the recipe builds goal heads but the set has no column {lacking[0]}",
                              np.ones(b - a, bool), split, a, c)
                return
        if not self.positional:
            v = self.jitter.random((n, 3))
        else:   # the draws a run over the splits one after the other gives these rows
            gen = np.random.Generator(np.random.PCG64(np.random.SeedSequence([self.seed, JITTER_SALT])))
            gen.bit_generator.advance(3 * (self.split_start[split] + a))
            v = gen.random((n, 3))
        self.report.rows[split] += n
        ep, t, slot = c["source_episode"], c["source_step"], c["slot"]
        s = c["strategy"].astype(np.int64)
        self.draws.counts += np.bincount(s, minlength=256)[:256]
        # order (ep, t, slot) strictly increasing
        if n > 1:
            inc = (ep[1:] > ep[:-1]) | ((ep[1:] == ep[:-1]) & ((t[1:] > t[:-1]) | ((t[1:] == t[:-1]) & (slot[1:] > slot[:-1]))))
            bad = np.zeros(n, bool)
            bad[1:] = ~inc
            self.violated("row order", "rows are not sorted by (source_episode, source_step, slot)", bad, split, a, c)
        runs = _Runs(ep)
        known = runs.spread(logs.known(runs.values))
        self.violated("source episode", "source episode not in the logs", ~known, split, a, c)
        if not known.all():
            c = {k: val[known] for k, val in c.items()}
            v, s = v[known], s[known]
            ep, t, slot = c["source_episode"], c["source_step"], c["slot"]
            runs = _Runs(ep)
        if len(ep) == 0:
            return
        pos = logs.position(ep, runs)
        np.add.at(counts, pos, 1)
        if "source" in c:
            self.violated("source", "source is not the code of the episode's source in the recipe",
                          c["source"].astype(np.int64) != logs.source.source_of(ep), split, a, c)
        k = logs.goals[pos]
        self.violated("source slot", "slot outside 0 .. goals_per_transition - 1 of the episode's source",
                      (slot < 0) | (slot >= k), split, a, c)
        T = logs.lengths[pos]
        if self.heads is not None:
            keep = known
            inside_all = (t >= 0) & (t < T)
            if not inside_all.all():   # rows outside their episode are reported above; heads audit the rest
                keep = known.copy()
                keep[np.flatnonzero(known)[~inside_all]] = False
            rows = np.flatnonzero(inside_all)
            sub = {k: val[rows] for k, val in c.items()}
            tasks = (logs.achieved_and_task_goal(ep[rows], t[rows])[3] if self.masks is not None and len(rows)
                     else None)
            self.heads.block(grp, a, b, keep, ep[rows], t[rows], T[rows], self.members[split],
                             lambda rule, message, mask: self.violated(rule, message, mask, split, a, sub), tasks)
        other = np.where(c["hop_episode"] >= 0, c["hop_episode"], c["goal_episode"])
        other_runs = _Runs(other)
        T_goal = logs.length_of(other)
        same_split = other_runs.spread(np.isin(other_runs.values, self.members[split]))
        valid = np.ones(len(ep), bool)
        for rule, message, mask in address_rules(c, T, T_goal, same_split, rc):
            self.violated(rule, message, mask, split, a, c)
            valid &= ~mask
        if all(k in c for k in LABELS):
            for rule, message, mask in label_rules(c, rc):
                self.violated(rule, message, mask, split, a, c)
        inside = (t >= 0) & (t < T)
        if inside.any():
            idx = np.flatnonzero(inside)
            sub = c if idx.size == len(ep) else {k: val[idx] for k, val in c.items()}   # read only
            orig = sub["strategy"] == ORIGINAL
            orig_rows = np.flatnonzero(orig)   # the task goal is needed at these rows only
            achieved, task, logged, task_ids = logs.achieved_and_task_goal(ep[idx], t[idx], flags=tuple(flags),
                                                                           materials="observation" in grp,
                                                                           chunk=chunk, task_rows=orig_rows)
            if "observation" in grp:
                self.stored_values(column, known, idx, logged, split, a, c)
            for col in flags:
                full = np.zeros(len(ep), bool)
                full[idx] = sub[col] != logged[col]
                self.violated(f"{col} flag", f"{col} is not the log's {END_FLAGS[col][0]} flag of transition t",
                              full, split, a, c)
            if self.masks is not None:
                for rule, message, mask in self.masks.rules(sub["goal_mask"], sub["strategy"], task_ids):
                    full = np.zeros(len(ep), bool)
                    full[idx] = mask
                    self.violated(rule, message, full, split, a, c)
            for rule, message, mask in reward_rules(sub, achieved, sub["goal"], rc):
                full = np.zeros(len(ep), bool)
                full[idx] = mask
                self.violated(rule, message, full, split, a, c)
            if orig.any():
                if task is None or task.shape[1] != sub["goal"].shape[1]:
                    wrong = orig
                else:
                    wrong = np.zeros(len(orig), bool)
                    wrong[orig_rows] = _differing_rows(np.take(sub["goal"], orig_rows, axis=0)
                                                       != task.astype(sub["goal"].dtype))
                full = np.zeros(len(ep), bool)
                full[idx] = wrong
                self.violated("original", "original: the goal is not the log's task goal of step t", full,
                              split, a, c)
        self.laws(c, s, T, T_goal, v, valid, split)

    def stored_values(self, column, known, idx, logged, split, a, c):
        """observation, action, next_observation: the logged values cast to the stored dtype here.

        The cast is numpy's (IEEE 754 round to nearest, ties to even, for floats), applied to the
        logs' values in the dtype this audit expects (:attr:`_Logs.stored_dtypes`).
        """
        n = len(c["source_episode"])
        for col in ("observation", "action", "next_observation"):
            stored = np.asarray(column(col))
            if not known.all():
                stored = stored[known]
            if idx.size != len(stored):
                stored = stored[idx]
            want = self.logs.stored_dtypes[col]
            with np.errstate(over="ignore", invalid="ignore"):
                expect = np.asarray(logged[col]).astype(want, copy=False)
            same = stored == expect
            if not np.all(same):   # NaN where both are NaN counts as the same value
                same = same | (np.isnan(stored.astype(np.float64)) & np.isnan(expect.astype(np.float64)))
            full = np.zeros(n, bool)
            same = same.reshape(len(idx), -1)
            full[idx] = False if same.all() else ~same.all(axis=1)
            self.violated(f"{col} value", f"{col} is not the logged value cast to {want}", full, split, a, c)

    def laws(self, c, s, T, T_goal, v, valid, split):
        rc, d = self.rc, self.draws
        ep, t, j, join = c["source_episode"], c["source_step"], c["goal_step"], c["join_step"]
        main = np.full(len(s), np.nan)
        same_p = np.full(len(s), np.nan)
        # each law is evaluated at the rows of its strategy only (the same values, row by row)
        for code, name, law in (
                (FUTURE, "future step", lambda i: uniform_law(j[i], t[i] + 1, T[i], v[i, 0])),
                (EPISODE, "episode step", lambda i: uniform_law(j[i], 0, T[i], v[i, 0])),
                (GEOMETRIC, "geometric offset",
                 lambda i: geometric_law(j[i] - t[i], T[i] - t[i], rc.gamma, rc.past_end, v[i, 0])),
                (NEIGHBOUR, "neighbour join step", lambda i: uniform_law(join[i], t[i] + 1, T[i], v[i, 0])),
                (NEAR_MISS, "near_miss join step", lambda i: uniform_law(join[i], t[i] + 1, T[i], v[i, 0]))):
            if code in rc.weights:
                i = np.flatnonzero(valid & (s == code))
                rows = law(i)
                d.law(name, rows)
                main[i] = rows.pit
                same_p[i] = np.broadcast_to(rows.p_same, i.shape)
        if OTHER in rc.weights:
            i = np.flatnonzero(valid & (s == OTHER))
            ids = self.members[split]
            ge, e = c["goal_episode"][i], ep[i]
            rank = np.searchsorted(ids, ge) - (ge > e)
            rows = uniform_law(rank, 0, max(len(ids) - 2, 0), v[i, 1])
            d.law("other_episode episode", rows)
            main[i] = rows.pit
            d.law("other_episode step", uniform_law(j[i], 0, T_goal[i], v[i, 2]))
        # disjoint slot pairs (0, 1), (2, 3), ... of one transition: independent under the recipe
        slot = c["slot"]
        paired = (slot[:-1] % 2 == 0) & (slot[1:] == slot[:-1] + 1) & (ep[1:] == ep[:-1]) & (t[1:] == t[:-1])
        # strategies of every pair (whatever their goals), goal steps of pairs whose rows keep the rules
        drawn = among(s, list(rc.weights))
        k = np.flatnonzero(paired & drawn[:-1] & drawn[1:])
        d.add(d.pairs_same_strategy, s[k] == s[k + 1], np.full(k.size, sum(p * p for p in rc.weights.values())))
        i = np.flatnonzero(paired & valid[:-1] & valid[1:])
        if i.size:
            sa, sb = s[i], s[i + 1]
            same_law = (sa == sb) & among(sa, [FUTURE, EPISODE, GEOMETRIC])
            d.add(d.pairs_same_step, same_law & (j[i] == j[i + 1]), same_p[i][same_law])
            ua, ub = main[i], main[i + 1]
            both = np.isfinite(ua) & np.isfinite(ub)
            ga = np.minimum((ua[both] * 10).astype(np.int64), 9)
            gb = np.minimum((ub[both] * 10).astype(np.int64), 9)
            np.add.at(d.grid, (ga, gb), 1)

    def checks(self):
        rc, d = self.rc, self.draws
        out = []
        n = int(d.counts.sum())
        for code, p in rc.weights.items():
            out.append(binom_check(f"share of {CODE_NAMES[code]}", int(d.counts[code]), n, p,
                                   f"rows drawing {CODE_NAMES[code]}"))
        n_val, n_eps = len(self.members["validation"]), len(self.members["train"]) + len(self.members["validation"])
        out.append(binom_check("split fraction", n_val, n_eps, rc.validation, "validation episodes"))
        for name in sorted(d.hist):
            out.append(uniform_chi2_check(f"law of {name}", d.hist[name], f"PIT of the {name}"))
            for end in ("low", "high"):
                hit, probs = d.ends[(name, end)]
                probs = dict(sorted(probs.items()))   # summed in one order, however the rows came
                out.append(count_bound_check(f"{name}: {'first' if end == 'low' else 'last'} value of the range",
                                             hit, list(probs), list(probs.values()), "rows"))
        for name, (hit, probs), what in (
                ("slot pairs: same strategy", d.pairs_same_strategy, "pairs of slots (2k, 2k+1) with one strategy"),
                ("slot pairs: same goal step", d.pairs_same_step, "same-strategy slot pairs with one goal step")):
            probs = dict(sorted(probs.items()))
            out.append(count_bound_check(name, hit, list(probs), list(probs.values()), what))
        out.append(grid_chi2_check("slot pairs: independent draws", d.grid, "PIT pairs of slots (2k, 2k+1)"))
        if self.masks is not None:
            out.append(self.masks.check())
        if self.heads is not None:
            out.extend(self.heads.checks())
        return [c for c in out if c is not None]


def share_power_note(n: int = 100_000, share: float = 0.2, checks: int = 25, alpha: float = ALPHA) -> float:
    """The shift quoted in the help of ``verify --sample`` (see docs/audit.md)."""
    return share_power(n, share, alpha / checks)


def audit_into(path, report, sample: int | None = None, relocation: Relocation | None = None,
               opened=None) -> AuditReport:
    """Run :func:`audit_set` and record its outcome in a verify report.

    Each audit failure becomes a failure of ``report`` (``report.fail``), and the audit's
    summary goes to ``report.checked["audit"]``.
    """
    return record_audit(report, audit_set(path, sample=sample, relocation=relocation, opened=opened))


def record_audit(report, result: AuditReport) -> AuditReport:
    """Record an audit's outcome in a verify report (failures prefixed ``audit:``, ``checked["audit"]``)."""
    for message in result.failures:
        report.fail(f"audit: {message}")
    report.checked["audit"] = result.as_dict()
    return result
