"""From a built set to a held-out goal suite (and its card): :func:`make_suite`."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from goalkit import rng
from goalkit.errors import DatasetError, GoalkitError
from goalkit.goals.neighbours import IndexSettings, build_index
from goalkit.outputs import check_no_overlap, refuse_existing, write_text
from goalkit.suites import reach, strata
from goalkit.suites.card import card_path, is_suite_card, render_card
from goalkit.suites.fileformat import is_suite_file, logs_checksum, set_checksum, write_suite
from goalkit.write.reader import open_set

#: Columns read from the validation split.
_READ = ("source_episode", "source_step", "slot", "goal", "steps_to_goal", "observation", "action",
         "reached_goal")


@dataclass(frozen=True)
class SuiteResult:
    """What :func:`make_suite` wrote.

    Attributes
    ----------
    path, card : Path
        The suite file and its Markdown card.
    rows : int
    counts : dict
        Rows per route, horizon bucket and proximity, and the candidates they came from.
    strata : dict
        The settings and derived cuts (edges, bucket names, near/far cut, join radius, ...).
    """

    path: Path
    card: Path
    rows: int
    counts: dict
    strata: dict

    def as_dict(self) -> dict:
        """JSON-able form."""
        return {"path": str(self.path), "card": str(self.card), "rows": self.rows, "counts": self.counts,
                "strata": self.strata}


def default_join_radius(goalset) -> float:
    """The set's reward threshold when its distance is Euclidean with one threshold.

    Raises
    ------
    GoalkitError
        When the set's reward rule has another distance or per-dimension thresholds (give the
        join radius explicitly).
    """
    rule = goalset.provenance.get("reward", {})
    thr = rule.get("threshold")
    if rule.get("distance") == "euclidean" and isinstance(thr, (int, float)) and thr > 0:
        return float(thr)
    raise GoalkitError(f"the set's reward rule ({rule.get('distance')}, threshold {thr!r}) gives no Euclidean "
                       f"join radius; give one", key="--join-radius")


def check_settings(*, far_quantile, far_distance, join_radius, join_neighbours, per_cell, candidates) -> None:
    """Raise GoalkitError (naming the option) for impossible settings."""
    if far_distance is None and not 0.0 < float(far_quantile) < 1.0:
        raise GoalkitError(f"expected a quantile in (0, 1), got {far_quantile!r}", key="--far-quantile")
    if far_distance is not None and not float(far_distance) >= 0.0:
        raise GoalkitError(f"expected a distance >= 0, got {far_distance!r}", key="--far-distance")
    if join_radius is not None and not float(join_radius) > 0.0:
        raise GoalkitError(f"expected a join radius > 0, got {join_radius!r}", key="--join-radius")
    for key, v in (("--join-neighbours", join_neighbours), ("--per-cell", per_cell), ("--candidates", candidates)):
        if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < 1:
            raise GoalkitError(f"expected a whole number >= 1, got {v!r}", key=key)


def make_suite(dataset, out, *, edges=strata.DEFAULT_EDGES, far_quantile: float = 0.5,
               far_distance: float | None = None, join_radius: float | None = None, join_neighbours: int = 8,
               per_cell: int = 100, candidates: int = 20_000, seed: int = 0, replace: bool = False,
               logs_root=None) -> SuiteResult:
    """Draw a held-out goal suite from the validation split of a built set.

    Parameters
    ----------
    dataset : str or Path
        A set written by ``goalkit build``.
    out : str or Path
        The suite file (HDF5); its card is written beside it (``OUT`` with suffix ``.md``).
    edges : sequence of int
        Horizon bucket edges in steps (see :func:`goalkit.suites.strata.bucket_names`).
    far_quantile : float
        Goals whose distance to the nearest training goal is above this quantile (of the
        candidates) are ``far``; ignored when ``far_distance`` is given.
    far_distance : float, optional
        An explicit near/far cut (goal-space units).
    join_radius : float, optional
        Radius of the neighbour joins between held-out episodes (default: the set's
        Euclidean reward threshold).
    join_neighbours : int
        Nearest states searched per state (joins) and per goal (reach).
    per_cell : int
        Rows kept per (route, horizon bucket, proximity) cell.
    candidates : int
        Validation rows considered at most (those with the smallest address hash).
    seed : int
        Seed of every choice; the same inputs and seed give a byte-identical suite.
    replace : bool
        Replace an existing suite file and card (only files of those kinds).
    logs_root : str or Path, optional
        Indexed sets: the folder that now holds the logs, when they moved (see :class:`goalkit.GoalSet`).

    Returns
    -------
    SuiteResult
    """
    edges = strata.check_edges(edges)
    check_settings(far_quantile=far_quantile, far_distance=far_distance, join_radius=join_radius,
                   join_neighbours=join_neighbours, per_cell=per_cell, candidates=candidates)
    out = Path(out)
    card = card_path(out)
    with open_set(dataset, logs_root=logs_root) as gs:
        logs = gs.provenance.get("logs_path")
        moved = [("log file", p) for p in gs.source_files()] if gs.mode == "indexed" else []
        check_no_overlap([("set", dataset), ("logs", logs if isinstance(logs, str) else None)] + moved,
                         [("--out", out), ("card", card)])
        refuse_existing(out, replace=replace, ours=is_suite_file, what="suite file")
        refuse_existing(card, replace=replace, ours=is_suite_card, what="suite card")
        radius = float(join_radius) if join_radius is not None else default_join_radius(gs)
        n_val = gs.rows("validation")
        if n_val == 0:
            raise DatasetError("the set has no validation rows to draw a held-out suite from "
                               "(build it with [split] validation > 0)", file=dataset, key="validation")
        v = gs.read("validation", list(_READ))
        graph = reach.build_graph(v["source_episode"], v["source_step"], v["reached_goal"], radius=radius,
                                  k=join_neighbours, state_goal=_state_goals(gs, v))
        key = rng.hash64(seed, v["source_episode"], v["source_step"], v["slot"], stream=strata.SUITE_STREAM + 1)
        cand = np.sort(np.argsort(key, kind="stable")[:candidates])
        route, horizon = reach.classify(graph, v["source_episode"][cand], v["source_step"][cand],
                                        v["goal"][cand], v["steps_to_goal"][cand], radius=radius, k=join_neighbours)
        keep = horizon != 0
        cand, route, horizon = cand[keep], route[keep], horizon[keep]
        train_goals = gs.read("train", ["goal"])["goal"]
        if len(train_goals) == 0:
            raise DatasetError("the set has no training rows to measure goal distances against", file=dataset,
                               key="train")
        goals = v["goal"][cand]
        index = build_index(train_goals, IndexSettings(k=1, seed=seed),
                            calibration=goals if len(goals) else None)
        dist = index.search(goals, 1)[0][:, 0] if len(goals) else np.zeros(0)
        cut = float(far_distance) if far_distance is not None else (
            float(np.quantile(dist, far_quantile)) if len(dist) else 0.0)
        bucket = strata.horizon_bucket(horizon, edges)
        prox = strata.proximity(dist, cut)
        names = strata.bucket_names(edges)
        cell = strata.cell_of(route, bucket, prox, len(names))
        ep, st, sl = v["source_episode"][cand], v["source_step"][cand], v["slot"][cand]
        chosen = strata.pick_per_cell(cell, ep, st, sl, per_cell=per_cell, seed=seed)
        rows = cand[chosen]
        columns = {
            "state": v["observation"][rows], "goal": v["goal"][rows], "horizon": horizon[chosen],
            "reachable": (route[chosen] != strata.NONE).astype(np.uint8), "action": v["action"][rows],
            "episode": ep[chosen], "step": st[chosen], "slot": sl[chosen], "route": route[chosen],
            "bucket": bucket[chosen], "proximity": prox[chosen], "train_distance": dist[chosen].astype(np.float32),
        }
        settings = {"edges": list(edges), "buckets": names, "routes": list(strata.ROUTES),
                    "proximity": list(strata.PROXIMITY), "near_far_cut": cut,
                    "far_quantile": None if far_distance is not None else float(far_quantile),
                    "join_radius": radius, "join_neighbours": int(join_neighbours), "per_cell": int(per_cell),
                    "candidates": int(candidates), "index": index.report.as_dict()}
        counts = {"validation_rows": int(n_val), "candidates": int(len(cand)), "joins": graph.joins,
                  "rows": int(len(rows)), "episodes": int(np.unique(columns["episode"]).size),
                  "cells": _cell_counts(route, bucket, prox, chosen, names)}
        attrs = {"seed": seed, "set_path": str(dataset), "set_checksum": set_checksum(gs),
                 "logs_checksum": logs_checksum(gs), "strata": settings, "counts": counts}
    path = write_suite(out, columns, attrs, replace=replace)
    write_text(card, render_card(out, attrs), replace=replace, ours=is_suite_card, what="suite card")
    return SuiteResult(path, card, int(len(rows)), counts, settings)


def _state_goals(goalset, v):
    """phi(s_t) of the validation rows when the set's goal map selects observation columns, else None."""
    gm = goalset.provenance.get("goal_map", {})
    idx = gm.get("indices") if gm.get("kind") == "indices" else None
    obs = v["observation"]
    if not idx or obs.ndim != 2 or max(idx) >= obs.shape[1]:
        return None
    return obs[:, np.asarray(idx, np.int64)].astype(v["reached_goal"].dtype)


def _cell_counts(route, bucket, prox, chosen, names) -> list[dict]:
    """One entry per non-empty cell: its labels, candidates and rows kept."""
    out = []
    picked = np.zeros(route.size, bool)
    picked[chosen] = True
    for r in range(len(strata.ROUTES)):
        for b in range(len(names)):
            for p in range(2):
                m = (route == r) & (bucket == b) & (prox == p)
                if m.any():
                    out.append({"route": strata.ROUTES[r], "bucket": names[b], "proximity": strata.PROXIMITY[p],
                                "candidates": int(m.sum()), "rows": int((m & picked).sum())})
    return out
