"""Score named checkpoints on a suite: :func:`assess_suite`."""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from goalkit.errors import DatasetError, GoalkitError
from goalkit.scoring import metrics
from goalkit.scoring.entry import load_entry
from goalkit.scoring.report import render, write_plots
from goalkit.suites.fileformat import logs_checksum, read_suite, set_checksum
from goalkit.suites.strata import EPISODE
from goalkit.write.reader import open_set

#: Said by every report (text, JSON, plots' captions).
CAUTION = ("These are offline proxies computed against logged behaviour on held-out goals. They are not a "
           "substitute for supervised trials on the machine: test in simulation first, then under supervision, "
           "following robot-safety standards and local regulations, with qualified safety engineers.")


@dataclass
class AssessResult:
    """Scores of up to two policies and two value functions on one suite.

    Attributes
    ----------
    report : dict
        JSON-able: suite and set, settings, ``policy`` and ``value`` sections, ``caution``.
    timing : dict
        Seconds in total, inside the user's callables, and goalkit's own overhead per row.
    predictions : dict
        ``"policy"`` / ``"value"``: list of arrays, one per checkpoint (for the plots).
    suite_columns : dict
        The suite's columns.
    """

    report: dict
    timing: dict
    predictions: dict = field(default_factory=dict)
    suite_columns: dict = field(default_factory=dict)

    def write_plots(self, out_dir, *, replace: bool = False) -> list:
        """Write the PNG plots into ``out_dir`` (see :func:`goalkit.scoring.report.write_plots`)."""
        return write_plots(self, out_dir, replace=replace)

    def render(self) -> str:
        """The report as text."""
        return render(self.report)

    def as_dict(self) -> dict:
        """The report with its timing."""
        return {**self.report, "timing": self.timing}


def check_options(*, policies, values, batch_size, resamples, confidence) -> None:
    """Raise GoalkitError (naming the option) for impossible settings."""
    if not policies and not values:
        raise GoalkitError("expected at least one checkpoint: --policy ENTRY and/or --value ENTRY "
                           "(package.module:callable)", key="--policy")
    for key, given in (("--policy", policies), ("--value", values)):
        if len(given) > 2:
            raise GoalkitError(f"expected at most two checkpoints side by side, got {len(given)}", key=key)
    if isinstance(batch_size, bool) or not isinstance(batch_size, (int, np.integer)) or batch_size < 1:
        raise GoalkitError(f"expected a batch size >= 1, got {batch_size!r}", key="--batch-size")
    if isinstance(resamples, bool) or not isinstance(resamples, (int, np.integer)) or resamples < 0:
        raise GoalkitError(f"expected resamples >= 0, got {resamples!r}", key="--resamples")
    if not 0.0 < float(confidence) < 1.0:
        raise GoalkitError(f"expected a confidence in (0, 1), got {confidence!r}", key="--confidence")


def check_suite_matches(suite, dataset) -> None:
    """Refuse a suite drawn from another set (or another set's logs), by checksum."""
    with open_set(dataset) as gs:
        mine, logs = set_checksum(gs), logs_checksum(gs)
    if suite.set_checksum == mine:
        return
    why = "built from other logs" if suite.logs_checksum != logs else "another build of these logs"
    raise DatasetError(f"the suite was drawn from another set ({why}: suite's set checksum "
                       f"{suite.set_checksum[:16]}..., this set's {mine[:16]}...); make a suite from this set",
                       file=suite.path, key="set_checksum")


def _predict(entry, cols, batch_size, width, clock) -> np.ndarray:
    n = len(cols["horizon"])
    outs = []
    for a in range(0, n, batch_size):
        # copies: a callable that writes into its inputs cannot change the suite being scored
        batch = {"observation": cols["state"][a:a + batch_size].copy(), "goal": cols["goal"][a:a + batch_size].copy()}
        t0 = time.perf_counter()
        out = entry.call(batch, start=a)
        clock[0] += time.perf_counter() - t0
        outs.append(entry.check(out, start=a, rows=len(batch["goal"]), width=width))
    return np.concatenate(outs) if outs else np.zeros((0, width) if entry.role == "policy" else 0)


def assess_suite(dataset, suite, *, policies=(), values=(), import_path=None, batch_size: int = 1024,
                 resamples: int = 1000, confidence: float = 0.95, seed: int = 0) -> AssessResult:
    """Score policies and value functions, named as entry points, on a held-out suite.

    Parameters
    ----------
    dataset : str or Path
        The set the suite was drawn from (checked by checksum).
    suite : str or Path
        A suite written by ``goalkit suite``.
    policies, values : sequence of str
        At most two entry points each, ``package.module:callable``. A policy is called with
        ``{"observation": (B, D), "goal": (B, G)}`` numpy arrays and returns ``(B, A)`` actions;
        a value function gets the same and returns ``(B,)`` values.
    import_path : str or Path, optional
        A folder put in front of ``sys.path`` to import the entry points from.
    batch_size : int
        Rows per call.
    resamples : int
        Bootstrap resamples over episodes (0: no intervals).
    confidence : float
        Interval coverage.
    seed : int
        Seed of the resamples.

    Returns
    -------
    AssessResult
    """
    start = time.perf_counter()
    policies, values = list(policies), list(values)
    check_options(policies=policies, values=values, batch_size=batch_size, resamples=resamples,
                  confidence=confidence)
    s = read_suite(suite)
    check_suite_matches(s, dataset)
    entries = ([load_entry(p, "policy", path=import_path) for p in policies],
               [load_entry(v, "value", path=import_path) for v in values])
    cols = s.columns
    episodes, group = np.unique(cols["episode"], return_inverse=True)
    g = episodes.size
    draws = metrics.draw_episodes(g, resamples, seed)
    names = s.strata.get("buckets", [])
    clock = [0.0]
    report = {"suite": str(s.path), "set": str(dataset), "rows": len(s), "episodes": int(g),
              "resamples": int(resamples), "confidence": float(confidence), "seed": int(seed), "caution": CAUTION}
    preds = {"policy": [], "value": []}
    width = cols["action"].shape[1] if cols["action"].ndim == 2 else 1
    if entries[0]:
        on = cols["route"] == EPISODE
        errs = []
        for e in entries[0]:
            p = _predict(e, cols, batch_size, width, clock)
            preds["policy"].append(p)
            logged = cols["action"].reshape(len(s), -1).astype(np.float64)
            errs.append(np.linalg.norm(p - logged, axis=1)[on])
        report["policy"] = _policy_section(entries[0], errs, cols["bucket"][on], group[on], g, draws, names,
                                           confidence)
    if entries[1]:
        vals = []
        for e in entries[1]:
            v = _predict(e, cols, batch_size, width, clock)
            preds["value"].append(v)
            vals.append(v)
        report["value"] = _value_section(entries[1], vals, cols, group, g, draws, confidence)
    total = time.perf_counter() - start
    calls = len(entries[0]) + len(entries[1])
    timing = {"total_s": total, "callable_s": clock[0], "overhead_s": total - clock[0],
              "overhead_per_row_s": (total - clock[0]) / max(1, len(s) * calls)}
    return AssessResult(report, timing, preds, cols)


def _policy_section(entries, errs, bucket, group, g, draws, names, confidence) -> dict:
    k = max(len(names), int(bucket.max(initial=-1)) + 1, 1)
    per = [metrics.mean_by_group_interval(e, group, g, draws, confidence, strata=bucket, n_strata=k) for e in errs]
    overall = [metrics.mean_by_group_interval(e, group, g, draws, confidence)[0] for e in errs]
    diff = diff_all = None
    if len(errs) == 2:
        diff = metrics.mean_by_group_interval(errs[0] - errs[1], group, g, draws, confidence, strata=bucket,
                                              n_strata=k)
        diff_all = metrics.mean_by_group_interval(errs[0] - errs[1], group, g, draws, confidence)[0]
    rows = np.bincount(bucket.astype(np.int64), minlength=k)
    by_bucket = []
    for b in range(k):
        if rows[b] == 0:
            continue
        by_bucket.append({"bucket": names[b] if b < len(names) else str(b), "rows": int(rows[b]),
                          "scores": [p[b].as_dict() for p in per],
                          "difference": diff[b].as_dict() if diff else None})
    return {"checkpoints": [e.spec for e in entries],
            "metric": "action error: Euclidean distance to the logged action, on rows whose own episode reaches "
                      "the goal",
            "rows": int(len(bucket)), "by_bucket": by_bucket,
            "overall": {"rows": int(len(bucket)), "scores": [o.as_dict() for o in overall],
                        "difference": diff_all.as_dict() if diff_all else None}}


def _value_section(entries, vals, cols, group, g, draws, confidence) -> dict:
    reach = cols["reachable"].astype(bool) & (cols["horizon"] > 0)
    target = -cols["horizon"][reach].astype(np.float64)
    label = cols["reachable"].astype(np.int64)
    out = {"checkpoints": [e.spec for e in entries]}
    sp = [metrics.rank_stat_interval(metrics.spearman_weighted, v[reach], target, group[reach], g, draws,
                                     confidence) for v in vals]
    auc = [metrics.rank_stat_interval(metrics.roc_auc_weighted, v, label, group, g, draws, confidence) for v in vals]
    out["spearman"] = {"rows": int(reach.sum()), "against": "negative steps-to-goal (reachable rows)",
                       "scores": [x.as_dict() for x in sp], "difference": None}
    out["roc_auc"] = {"rows": int(len(label)), "positives": int(label.sum()),
                      "against": "reachable (1) vs unreachable (0) goals",
                      "scores": [x.as_dict() for x in auc], "difference": None}
    if len(vals) == 2:
        out["spearman"]["difference"] = metrics.rank_stat_difference(
            metrics.spearman_weighted, vals[0][reach], vals[1][reach], target, group[reach], g, draws,
            confidence).as_dict()
        out["roc_auc"]["difference"] = metrics.rank_stat_difference(
            metrics.roc_auc_weighted, vals[0], vals[1], label, group, g, draws, confidence).as_dict()
    return out


__all__ = ["CAUTION", "AssessResult", "assess_suite", "check_options", "check_suite_matches"]
