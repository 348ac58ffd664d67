"""Verify checks of neighbour, library and near-miss rows that need the logs or the library."""

from __future__ import annotations

import numpy as np

from goalkit.relabel.strategies import CODES


def check_joined(plan, chunk, cols, phi, pos, split_name, report, row0, row_text) -> None:
    """Check near-miss goals beyond the threshold of their join state and library goals.

    Parameters
    ----------
    plan : BuildPlan
    chunk : EpisodeSet
    cols : dict of ndarray
        Stored rows of ``chunk``'s episodes.
    phi : ndarray
        phi of the chunk's states (stored precision).
    pos : ndarray of int64
        Position in ``chunk`` of each row's source episode.
    split_name, report, row0, row_text
        As in :func:`goalkit.write.verify.check_rows`.
    """
    if "join_step" not in cols:
        return
    s, t, join = cols["strategy"], cols["source_step"], cols["join_step"]
    rule = plan.recipe.reward
    lengths = chunk.lengths[pos]
    usable = (join >= 0) & (join <= lengths)

    def fail(mask, message):
        if mask.any():
            i = int(np.flatnonzero(mask)[0])
            report.fail(f"{split_name} row {row0 + i} ({row_text(cols, i)}): {message}")

    def reached_at_join(rows):
        at = phi[chunk.state_row(pos[rows], join[rows])].astype(np.float64)
        return rule.reached(at, cols["goal"][rows].astype(np.float64))

    miss = np.flatnonzero((s == CODES["near_miss"]) & (cols["hop_episode"] >= 0) & usable)
    if miss.size:
        bad = np.zeros(len(s), bool)
        bad[miss] = reached_at_join(miss)
        fail(bad, "a near-miss goal must lie beyond the threshold of the join state phi(s_join_step)")
    lib_rows = np.flatnonzero(s == CODES["library"])
    if lib_rows.size == 0:
        return
    library = getattr(plan.context, "library", None)
    if library is None:
        report.fail(f"{split_name}: library rows but the recipe gives no goal library")
        return
    gd = np.dtype(plan.recipe.goal.dtype)
    targets = np.ascontiguousarray(library.targets.astype(gd))
    stored = np.ascontiguousarray(cols["goal"][lib_rows].astype(gd))
    void = np.dtype((np.void, targets.dtype.itemsize * targets.shape[1]))
    known = np.isin(stored.view(void).ravel(), targets.view(void).ravel())
    bad = np.zeros(len(s), bool)
    bad[lib_rows] = ~known
    fail(bad, "a library goal must be one of the library's targets")
    matched = lib_rows[usable[lib_rows]]
    bad = np.zeros(len(s), bool)
    if matched.size:
        bad[matched] = ~reached_at_join(matched)
    fail(bad, "a matched library goal must be within the threshold of the join state phi(s_join_step)")
    unmatched = lib_rows[join[lib_rows] == -1]
    bad = np.zeros(len(s), bool)
    if unmatched.size:
        _, count = library.later_matches(cols["source_episode"][unmatched], t[unmatched])
        bad[unmatched] = count > 0
    fail(bad, "a library goal is marked unmatched, but a target is reached later in the episode")
