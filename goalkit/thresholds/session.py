"""Tune a recipe's goal-match threshold on its own logs: what ``goalkit tune`` runs.

:func:`tune_recipe` reads a deterministic sample of whole episodes of the recipe's logs
(:mod:`goalkit.thresholds.sample`), a chunk at a time, and in that one pass

* relabels every sampled transition with the recipe's own mixture
  (:func:`goalkit.pipeline.chunk.relabel_chunk`, so the goal rows are those a build makes
  for these episodes) and keeps each row's reached goal, goal and strategy;
* with ``from_success``, collects the labelled pairs ``(phi(s_{t+1}), task_goal[t],
  success[t])`` (:func:`goalkit.thresholds.labels.pairs_from_success`).

With a ``[mask]`` table each labelled pair is scored on its episode's task mask only (the
task table's entry for the episode's task id, or ``others``; never a random mask), so the
swept distances are those of :meth:`goalkit.reward.RewardRule.distance` with that mask. Pairs
from a labelled-pairs file find their task through their ``episode`` column.

Goal vectors are cast to the recipe's ``[goal] dtype`` first, as the build does, so the
distances are those the build would compute. With labels (a labelled-pairs file or the
success flags) each candidate distance is tuned with a
:class:`~goalkit.thresholds.tuner.ThresholdTuner`; the candidate with the best value of the
chooser's own criterion (F1 for ``max-f1``, Youden's J for ``youden``, recall for
``target-precision``) wins, ties going to the recipe's distance, then to the order given.
Label-free diagnostics (:func:`goalkit.thresholds.diagnostics.diagnose`) and the rewarded
fraction per strategy are computed in every mode, with the winning rule (or the recipe's).

The label-free *suggested range* is goalkit's own rule of thumb, not a published rule:

* low end: half the median one-step goal change. A path that passes straight through a goal
  at a typical speed has a state within half a step of it, so a smaller threshold misses
  goals the path went through;
* high end: the 25 % quantile of the distance to the nearest state of another episode.
  Above it, more than a quarter of the states count as reaching a state of some other
  episode, and goals borrowed from other episodes become cheap.
"""

from __future__ import annotations

from goalkit.errors import shown

import contextlib
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np

from goalkit.config import closest
from goalkit.errors import LabelError, ParameterError, TuningError
from goalkit.logs import spare
from goalkit.logs.episodes import chunk_bounds, kept_task_ids
from goalkit.pipeline.build import helped_layout, log_paths
from goalkit.pipeline.chunk import relabel_chunk
from goalkit.pipeline.plan import make_plan, open_source, strategy_names
from goalkit.pipeline.readproc import ChunkReader, wanted_ranges
from goalkit.pipeline.summary import HIGH_REACHED, LOW_REACHED
from goalkit.reward import DISTANCES, RewardRule, within
from goalkit.thresholds.box import suggest_box
from goalkit.thresholds.diagnostics import (RewardedFraction, diagnose, rewarded_fraction, state_goals,
                                            state_masks, threshold_warnings)
from goalkit.thresholds.labels import LabelledPairs, concat_pairs, load_labelled_pairs, pairs_from_success
from goalkit.thresholds.metrics import CHOOSERS, check_chooser
from goalkit.thresholds.plots import plot_diagnostics, plot_labelled
from goalkit.thresholds.report import render as render_report
from goalkit.thresholds.sample import SampledSource, concat_episodes, sample_episodes
from goalkit.thresholds.temporal import temporal_threshold
from goalkit.thresholds.tuner import ThresholdTuner

#: Default transition budget of the sample.
MAX_TRANSITIONS = 200_000
#: Transitions per chunk read.
CHUNK_TRANSITIONS = 50_000
#: Points of the rewarded-fraction curve.
CURVE_POINTS = 201
#: Which chooser value decides between candidate distances.
CRITERION = {"max-f1": "f1", "youden": "youden", "target-precision": "recall"}
#: Recall target of the per-dimension box suggestion.
BOX_RECALL = 0.95
#: Quantile of the other-episode distance used as the high end of the suggested range.
RANGE_HIGH_QUANTILE = 0.25


@dataclass
class Candidate:
    """One candidate distance: its rule and (when tuning worked) its fitted tuner."""

    distance: str
    rule: RewardRule
    tuner: ThresholdTuner | None = None
    error: str | None = None

    @property
    def score(self) -> float:
        """The chooser's criterion at the chosen point (-inf when tuning failed)."""
        if self.tuner is None:
            return -np.inf
        return float(getattr(self.tuner.choice_, CRITERION[self.tuner.chooser]))


@dataclass
class TuneResult:
    """Everything ``goalkit tune`` reports (see :meth:`as_dict` for the JSON form)."""

    recipe: object
    mode: str
    labels_source: str | None
    sample: dict
    candidates: list[Candidate]
    winner: Candidate | None
    box: object | None
    rule: RewardRule
    diagnostics: object
    rewarded: object
    rewarded_at: dict
    suggested_range: dict
    warnings: list[str]
    strategy_names: dict
    notes: list[str] = field(default_factory=list)

    @property
    def labels_used(self) -> bool:
        """Whether labels were used (False: diagnostics only)."""
        return self.mode != "no-labels"

    def recipe_threshold(self):
        """The value for ``[reward] threshold`` (None without labels)."""
        return None if self.winner is None else self.winner.tuner.recipe_threshold()

    def recipe_distance(self) -> str | None:
        """The winning distance name (None without labels)."""
        return None if self.winner is None else self.winner.distance

    def render(self) -> str:
        """The terminal table ``goalkit tune`` prints for this result."""
        return render_report(self.as_dict())

    def as_dict(self) -> dict:
        """JSON-able summary (what ``goalkit tune --json`` prints)."""
        cands = []
        for c in self.candidates:
            entry = {"distance": c.distance, "error": c.error, "recipe_distance":
                     c.distance == self.recipe.reward.distance_name}
            if c.tuner is not None:
                entry.update(c.tuner.summary())
                if not entry["recipe_distance"]:
                    entry["current"] = None  # the recipe's threshold is not on this distance's scale
            cands.append(entry)
        chosen = None
        if self.winner is not None:
            t = self.winner.tuner
            chosen = {"distance": self.winner.distance, "threshold": self.recipe_threshold(),
                      "distance_changed": self.winner.distance != self.recipe.reward.distance_name,
                      "chooser": t.chooser, "target": t.target,
                      "criterion": CRITERION[t.chooser], "score": self.winner.score,
                      "interval": None if t.interval_ is None else t.interval_.as_dict(),
                      **{k: getattr(t.choice_, k) for k in ("precision", "recall", "fpr", "f1")},
                      "roc_auc": t.roc_auc_, "average_precision": t.average_precision_,
                      "region": t.summary().get("region")}
        return {
            "recipe": self.recipe.file,
            "mode": self.mode,
            "labels_used": self.labels_used,
            "labels_source": self.labels_source,
            "sample": self.sample,
            "current_rule": self.recipe.reward.describe(),
            "masks": None if self.recipe.masks is None else self.recipe.masks.describe(),
            "candidates": cands,
            "chosen": chosen,
            "box_suggestion": None if self.box is None else self.box.as_dict(),
            "diagnostics": {**self.diagnostics.summary(), "rule": self.rule.describe()},
            "suggested_range": self.suggested_range,
            "rewarded_fraction": self.rewarded_at,
            "warnings": list(self.warnings),
            "notes": list(self.notes),
        }

    def write_plots(self, out_dir, prefix: str = "", replace: bool = False) -> list[Path]:
        """Write every plot into ``out_dir`` (created); return the files, sorted by name.

        Existing PNG files of the same names are replaced only with ``replace``.
        """
        written: list[Path] = []
        ok = [c for c in self.candidates if c.tuner is not None]
        for c in ok:
            p = prefix if len(ok) == 1 else f"{prefix}{c.distance}-"
            cur = c.tuner.current_ if c.distance == self.recipe.reward.distance_name else None
            written += plot_labelled(c.tuner.sweep_, c.tuner.choice_, out_dir, prefix=p,
                                     current=cur, replace=replace, distance=c.distance).values()
        written += plot_diagnostics(self.diagnostics, out_dir, prefix=prefix, rewarded=self.rewarded,
                                    strategy_names=self.strategy_names, replace=replace,
                                    distance=self.rule.distance_name,
                                    threshold_owner="recipe" if self.winner is None else "suggested").values()
        return sorted(written)


# ---- option checks ------------------------------------------------------------------------
def check_distances(names) -> list[str]:
    """Distance names, de-duplicated in order; refuse unknown ones naming the closest."""
    out: list[str] = []
    for raw in names:
        for name in (n.strip() for n in str(raw).split(",")):
            if not name:
                continue
            if name not in DISTANCES:
                hint = closest(name, DISTANCES)
                tip = f"; did you mean '{hint}'?" if hint else ""
                raise TuningError(f"unknown distance {name!r}{tip} valid: {', '.join(DISTANCES)}",
                                  key="--distance")
            if name not in out:
                out.append(name)
    return out


def check_options(*, labels, from_success, chooser, target, n_resamples, max_transitions) -> None:
    """Refuse impossible option combinations before any file is read."""
    if labels is not None and from_success:
        raise TuningError("give either a labelled-pairs file or --from-success, not both", key="--labels")
    if chooser not in CHOOSERS:
        hint = closest(chooser, CHOOSERS)
        tip = f"; did you mean '{hint}'?" if hint else ""
        raise TuningError(f"unknown chooser {chooser!r}{tip} valid: {', '.join(CHOOSERS)}",
                          key="--chooser")
    if target is not None and chooser != "target-precision":
        raise TuningError(f"a precision target only applies to the chooser 'target-precision', "
                          f"not {chooser!r}", key="--target-precision")
    if chooser == "target-precision" and (target is None or not 0.0 < float(target) <= 1.0):
        raise TuningError(f"chooser 'target-precision' needs a target precision in (0, 1], got "
                          f"{shown(target)}", key="--target-precision")
    check_chooser(chooser, target, "midpoint")
    if n_resamples < 0:
        raise TuningError(f"expected resamples >= 0, got {n_resamples}", key="--resamples")
    if max_transitions < 1:
        raise TuningError(f"expected a transition budget >= 1, got {max_transitions}",
                          key="--max-transitions")


def candidate_rule(rule: RewardRule, distance: str, dim: int) -> RewardRule:
    """``rule`` with another distance; its threshold only scales the sweep's box units.

    A scalar rule turned into ``box`` gets the same tolerance in every dimension (1.0 when
    the threshold is 0) and no weights; a box rule turned scalar gets its largest tolerance.
    """
    if distance == rule.distance_name:
        return rule
    if distance == "box":
        thr = rule.threshold if isinstance(rule.threshold, float) else max(rule.threshold)
        tol = float(thr) if thr > 0 else 1.0
        return rule.replace(distance="box", threshold=(tol,) * dim, weights=None)
    thr = rule.threshold if isinstance(rule.threshold, float) else float(max(rule.threshold))
    return rule.replace(distance=distance, threshold=thr)


# ---- the run --------------------------------------------------------------------------------
def _cast(x, dtype) -> np.ndarray:
    return np.asarray(x, dtype=np.float64).astype(dtype).astype(np.float64)


def _chunk_rows(plan, chunk, gdtype):
    """(achieved, goal, strategy, goal_mask or None) of every goal row the build makes for ``chunk``."""
    rows = relabel_chunk(plan, chunk, defer_gathers=True)  # observation columns unused: never copied
    phi = _cast(plan.goal_map(chunk, np.arange(chunk.observations.shape[0])), gdtype)
    out = []
    for cols in rows.columns.values():
        pos = chunk.position_of(cols["source_episode"])
        nxt = chunk.state_row(pos, np.asarray(cols["source_step"], dtype=np.int64) + 1)
        out.append((phi[nxt].astype(gdtype), np.asarray(cols["goal"]).astype(gdtype),
                    np.asarray(cols["strategy"]).astype(np.uint8), cols.get("goal_mask")))
    return out


def suggested_range(diagnostics, rule: RewardRule) -> dict:
    """The label-free rule-of-thumb range (see the module docstring), JSON-able.

    ``low`` / ``high`` are None when there are no transitions / no state of another episode.
    """
    step = diagnostics.step[np.isfinite(diagnostics.step)]
    other = diagnostics.other.distance[np.isfinite(diagnostics.other.distance)]
    low = 0.5 * float(np.median(step)) if step.size else None
    high = float(np.quantile(other, RANGE_HIGH_QUANTILE, method="linear")) if other.size else None
    out = {"low": low, "high": high, "ok": bool(low is not None and high is not None and low <= high),
           "basis": "low = half the median one-step goal change; high = the 25% quantile of the "
                    "distance to the nearest state of another episode (goalkit's rule of thumb)"}
    if rule.distance_name == "box":
        tol = np.asarray(rule.threshold, dtype=np.float64)
        out["unit"] = "scale of the current box tolerances"
        out["tolerances_low"] = None if low is None else (tol * low).tolist()
        out["tolerances_high"] = None if high is None else (tol * high).tolist()
    else:
        out["unit"] = f"{rule.distance_name} distance in goal space"
    return out


def _rewarded_at(d, rf, inclusive: bool, points: dict, names: dict) -> dict:
    """Rewarded fraction per strategy (and over all rows) at a few named thresholds.

    ``d``: each goal row's distance under the rule; ``rf``: :func:`rewarded_fraction` of the
    rows at the thresholds ``points`` (in that order).
    """
    labels = list(points)
    values = np.array([points[k] for k in labels], dtype=np.float64)
    # rows within each threshold over the rows (the count over the rows: as the mean of the flags)
    share = [np.count_nonzero(within(d, v, inclusive)) / d.size if d.size else float("nan") for v in values]
    out = {"thresholds": dict(zip(labels, values.tolist())), "strategies": {},
           "all": {"rows": int(d.size), "fraction": dict(zip(labels, share))}}
    for i, code in enumerate(rf.strategies.tolist()):
        out["strategies"][names.get(code, str(code))] = {
            "rows": int(rf.counts[i]), "fraction": dict(zip(labels, rf.fraction[i].tolist()))}
    return out


def _file_pair_masks(pairs: LabelledPairs, source, masks, chunk_transitions: int):
    """``pairs`` with each pair's episode task mask, looked up in the whole log; and a note or None.

    Pairs without an episode column, or whose episode is not in the logs, get the table's
    ``others`` mask (the note counts them).
    """
    tasks = np.full(pairs.size, -1, np.int64)
    found = np.zeros(pairs.size, bool)
    if pairs.grouped:
        ids = np.asarray(source.episode_ids, np.int64)
        tids = kept_task_ids(source, chunk_transitions)   # known from opening the logs, or read once
        if tids is None:
            tids = np.full(len(ids), -1, np.int64)
        order = np.argsort(ids, kind="stable")
        ids, tids = ids[order], tids[order]
        at = np.minimum(np.searchsorted(ids, pairs.groups), max(len(ids) - 1, 0))
        found = (ids[at] == pairs.groups) if len(ids) else found
        tasks[found] = tids[at[found]]
    missing = int(pairs.size - found.sum())
    note = None
    if missing:
        why = "the pairs carry no episode column" if not pairs.grouped else "their episode is not in the logs"
        note = (f"{missing} of {pairs.size} labelled pairs are scored with the [mask] table's mask of "
                f"other tasks: {why}")
    return pairs.with_mask(masks.task_mask(tasks)), note


@contextlib.contextmanager
def _worker_thread():
    """One worker thread; on the way out (an error, Ctrl-C) bootstraps not yet started are dropped."""
    pool = ThreadPoolExecutor(1, thread_name_prefix="goalkit-tune")
    try:
        yield pool
    finally:
        pool.shutdown(wait=True, cancel_futures=True)


def tune_recipe(recipe, *, labels=None, from_success: bool = False, distances=(),
                chooser: str = "max-f1", target=None, n_resamples: int = 1000,
                max_transitions: int = MAX_TRANSITIONS, chunk_transitions: int = CHUNK_TRANSITIONS,
                sample_states: int = 2000, progress=None) -> TuneResult:
    """Tune (or, without labels, diagnose) the threshold of ``recipe`` on its logs.

    Parameters
    ----------
    recipe : Recipe
        A loaded recipe (:func:`goalkit.pipeline.recipe.load_recipe`).
    labels : str or Path, optional
        A labelled-pairs file (.npz or .csv, see :mod:`goalkit.thresholds.labels`).
    from_success : bool
        Label the logs' own transitions by their success flags against their task goals.
    distances : sequence of str
        Candidate distances (default: the recipe's).
    chooser : {"max-f1", "target-precision", "youden"}
    target : float, optional
        Precision target of ``target-precision``.
    n_resamples : int
        Bootstrap resamples over episodes (0: no interval).
    max_transitions : int
        Budget of the episode sample (whole episodes, chosen by ``goalkit.rng`` from the
        recipe's seed).
    chunk_transitions : int
        Transitions per chunk read.
    sample_states : int
        States sampled for the nearest-other-episode diagnostic.
    progress : callable, optional
        Called as ``progress(transitions_done_in_chunk, total_transitions)``.

    Returns
    -------
    TuneResult

    Raises
    ------
    GoalkitError
        (LabelError, TuningError, RecipeError, LogError) on bad input, naming file and key.
    """
    check_options(labels=labels, from_success=from_success, chooser=chooser, target=target,
                  n_resamples=n_resamples, max_transitions=max_transitions)
    names = check_distances(distances) or [recipe.reward.distance_name]
    if recipe.reward.distance_name in names:  # the recipe's distance first: it wins ties
        names.remove(recipe.reward.distance_name)
        names.insert(0, recipe.reward.distance_name)
    file_pairs = load_labelled_pairs(labels) if labels is not None else None
    mode = "labels-file" if file_pairs is not None else ("success-flags" if from_success else "no-labels")

    # a spare helper process: it plans part of a large log's episodes, then reads the chunks
    with spare.scope(log_paths(recipe), early=helped_layout(recipe)), contextlib.ExitStack() as stack:
        source = open_source(recipe)
        positions = sample_episodes(source.episode_ids, source.lengths, max_transitions, recipe.seed)
        sub = SampledSource(source, positions)
        plan, _ = make_plan(recipe, sub, max_transitions=chunk_transitions)
        gmap = plan.goal_map
        gdtype = np.dtype(recipe.goal.dtype)
        for n in names:
            try:
                candidate_rule(recipe.reward, n, gmap.dim).check_dim(gmap.dim)
            except ParameterError as exc:
                raise exc.in_recipe(recipe.file, "reward") from None
        if file_pairs is not None and file_pairs.dim != gmap.dim:
            raise LabelError(f"expected pairs of goal dimension {gmap.dim} (the recipe's goal map), got "
                             f"{file_pairs.dim}", file=file_pairs.source, key="achieved")

        parts, succ, rows = [], [], []
        total = int(sub.lengths.sum())
        bounds = list(chunk_bounds(sub.lengths, chunk_transitions))
        # the chunks are read ahead by a helper process (the scope's spare) while they are relabelled here
        reader = ChunkReader(sub, bounds) if wanted_ranges(sub, bounds) else None
        if reader is not None:
            stack.callback(reader.close)
        for a, b in bounds:  # a loop over chunks
            chunk = sub.read(a, b) if reader is None else reader.read(a, b)
            parts.append(replace(chunk, frames=None))  # the diagnostics never look at camera frames
            if from_success:
                p = pairs_from_success(chunk, gmap, plan.masks)
                succ.append(LabelledPairs(_cast(p.achieved, gdtype), _cast(p.goal, gdtype), p.reached,
                                          p.groups, True, p.source, p.mask))
            rows += _chunk_rows(plan, chunk, gdtype)
            if progress is not None:
                progress(chunk.num_transitions, total)
    episodes = concat_episodes(parts)
    # kept in the goal dtype: every rule distance is computed in float64 from any input dtype
    # (the casts are exact), so the bits are those of float64 copies, without the copies
    achieved = np.concatenate([r[0] for r in rows])
    goal = np.concatenate([r[1] for r in rows])
    strategy = np.concatenate([r[2] for r in rows])
    # each row's goal_mask as the build stores it (task masks and random masks); None without [mask]
    row_mask = None if plan.masks is None else np.concatenate([r[3] for r in rows])

    # the bootstrap of each candidate runs on a thread while the diagnostics are computed here
    with _worker_thread() as pool:
        pairs = file_pairs if file_pairs is not None else (concat_pairs(succ) if from_success else None)
        candidates, winner, box, notes = [], None, None, []
        if file_pairs is not None and plan.masks is not None:
            pairs, note = _file_pair_masks(file_pairs, source, plan.masks, chunk_transitions)
            if note:
                notes.append(note)
        if pairs is not None:
            for n in names:
                rule = candidate_rule(recipe.reward, n, gmap.dim)
                cand = Candidate(n, rule)
                try:
                    cand.tuner = ThresholdTuner(rule, chooser=chooser, target=target,
                                                n_resamples=n_resamples, seed=recipe.seed,
                                                box_recall=BOX_RECALL).fit(pairs, executor=pool)
                except TuningError as exc:
                    if exc.key == "target":  # name the option the user gave
                        exc = TuningError(exc.message, file=exc.file, key="--target-precision")
                    if len(names) == 1:
                        raise exc from None
                    cand.error = str(exc)
                candidates.append(cand)
            ok = [c for c in candidates if c.tuner is not None]
            if not ok:
                raise TuningError(f"no candidate distance could be tuned; first: {candidates[0].error}")
            winner = max(ok, key=lambda c: c.score)  # max() keeps the first of equal scores
            box = winner.tuner.box_ if winner.tuner.box_ is not None else suggest_box(
                pairs.achieved, pairs.goal, pairs.reached, method="recall", recall=BOX_RECALL)
            diag_rule = winner.tuner.suggested_rule_
            if not pairs.grouped:
                notes.append("the labelled pairs carry no episode column: the bootstrap treats every "
                             "pair as its own episode, so the interval is too narrow")
        else:
            diag_rule = recipe.reward

        diag = diagnose(episodes, gmap, diag_rule, sample=sample_states, seed=recipe.seed, masks=plan.masks)
        summary = diag.summary()
        rng_ = suggested_range(diag, diag_rule)
        # label-free, from the logs' temporal order (goalkit.thresholds.temporal): holds when episodes overlap
        rng_["temporal"] = temporal_threshold(state_goals(episodes, gmap), episodes.offsets, diag_rule.distance,
                                              seed=recipe.seed, mask=state_masks(episodes, plan.masks)).as_dict()
        warnings = threshold_warnings(summary)
        if not rng_["ok"] and rng_["low"] is not None and rng_["high"] is not None:
            warnings.append(f"no clean range: half the typical one-step change ({rng_['low']:.4g}) is above "
                            f"the 25% quantile of the distance to other episodes ({rng_['high']:.4g})")

        box_units = diag_rule.distance_name == "box"
        current = 1.0 if recipe.reward.distance_name == "box" else float(recipe.reward.threshold)
        points = {}
        if diag_rule.distance_name == recipe.reward.distance_name:
            points["recipe"] = current if not box_units else float(
                np.max(np.asarray(recipe.reward.threshold) / np.asarray(diag_rule.threshold)))
        if winner is not None:
            points["suggested"] = 1.0 if box_units else float(diag_rule.threshold)
        if rng_["low"] is not None:
            points["range_low"] = rng_["low"]
        if rng_["high"] is not None:
            points["range_high"] = rng_["high"]
        snames = strategy_names(recipe.mixture)
        d = diag_rule.distance(achieved, goal, row_mask)
        ref = max(points.values()) if points else 1.0
        top = max(2.0 * ref, float(np.quantile(d, 0.95)) if d.size else 1.0, 1e-12)
        grid = np.linspace(0.0, top, CURVE_POINTS)
        named = np.array([points[k] for k in points], dtype=np.float64)
        # one sort of the rows' distances serves the named points and the curve
        both = rewarded_fraction(achieved, goal, strategy, diag_rule, np.r_[named, grid], row_mask, distances=d)
        at_points = RewardedFraction(both.strategies, named, both.fraction[:, :named.size], both.counts)
        curve = RewardedFraction(both.strategies, grid, both.fraction[:, named.size:], both.counts)
        rewarded_at = _rewarded_at(d, at_points, diag_rule.inclusive, points, snames)

        for label, frac in rewarded_at["all"]["fraction"].items():
            if label in ("recipe", "suggested") and not LOW_REACHED <= frac <= HIGH_REACHED:
                warnings.append(f"at the {label} threshold {points[label]:.4g} about {frac:.1%} of the "
                                f"sampled goal rows are rewarded (outside {LOW_REACHED:.0%} .. "
                                f"{HIGH_REACHED:.0%}); the build will warn about it")

        sample = {"episodes": int(positions.size), "transitions": total,
                  "episodes_in_log": int(len(source.lengths)),
                  "transitions_in_log": int(np.sum(source.lengths)),
                  "max_transitions": int(max_transitions), "seed": int(recipe.seed),
                  "goal_rows": int(d.size), "whole_log": bool(positions.size == len(source.lengths))}
        if not sample["whole_log"]:
            notes.append(f"tuned on a sample of {sample['episodes']} of {sample['episodes_in_log']} episodes "
                         f"(--max-transitions {max_transitions}); goals borrowed from other episodes come "
                         f"from the sample only")
        for c in candidates:  # wait for the intervals (and raise what a bootstrap raised)
            if c.tuner is not None:
                c.tuner.interval_
        return TuneResult(recipe=recipe, mode=mode, labels_source=None if pairs is None else pairs.source,
                          sample=sample, candidates=candidates, winner=winner, box=box, rule=diag_rule,
                          diagnostics=diag, rewarded=curve, rewarded_at=rewarded_at,
                          suggested_range=rng_, warnings=warnings, strategy_names=snames, notes=notes)


__all__ = ["tune_recipe", "TuneResult", "Candidate", "check_distances", "check_options",
           "candidate_rule", "suggested_range"]
