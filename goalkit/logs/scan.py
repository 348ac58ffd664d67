"""Summarise opened logs: sizes, lengths, keys, observation ranges, success by task, findings.

:func:`scan_logs` reads the log chunk by chunk (never the whole log at once) and returns a
JSON-able dict; ``goalkit scan`` prints it as a table or as JSON.
"""

from __future__ import annotations

import numpy as np

from goalkit.logs.episodes import chunk_bounds


def _length_stats(lengths: np.ndarray) -> dict:
    return {"min": int(lengths.min()), "median": float(np.median(lengths)),
            "mean": float(lengths.mean()), "max": int(lengths.max())}


def _dimension_names(fields: dict, width: int) -> list[str]:
    names = [""] * width
    for name, (a, b) in fields.items():
        for i in range(a, b):
            names[i] = name if b - a == 1 else f"{name}[{i - a}]"
    return names


def scan_logs(source, max_transitions: int = 200_000, advance=None) -> dict:
    """Read a log once, chunk by chunk, and report on it.

    Parameters
    ----------
    source : LogSource
        Opened logs (see :func:`goalkit.logs.open_logs`).
    max_transitions : int
        Transitions per chunk read.
    advance : callable, optional
        Called with the number of transitions after each chunk (a progress bar's ``update``).

    Returns
    -------
    dict
        ``episodes`` (kept), ``steps`` (transitions), ``episodes_in_log``, ``shape``,
        ``convention``, ``lengths`` (min/median/mean/max), ``keys`` (role, key, dtype, shape),
        ``observation_range`` (per dimension: dim, field, min, max), ``success_by_task``
        (per task: episodes, succeeded, rate; episode success = any success flag) or None,
        ``rewards`` (min/max/mean) or None, ``notes``, ``skipped`` (episode, reason) and
        ``problems`` (findings that are not errors).

    Examples
    --------
    >>> report = scan_logs(open_logs("gantry.h5", "layout.toml"))   # doctest: +SKIP
    >>> report["episodes"], report["steps"]                          # doctest: +SKIP
    (200, 11873)
    """
    lengths = np.asarray(source.lengths, dtype=np.int64)
    lo = hi = None
    succ_ep, task_ep = [], []
    r_min, r_max, r_sum, r_n = np.inf, -np.inf, 0.0, 0
    has_success = has_reward = False
    for a, b in chunk_bounds(lengths, max_transitions):
        es = source.read(a, b)
        obs = es.observations
        c_lo, c_hi = obs.min(axis=0), obs.max(axis=0)
        lo = c_lo if lo is None else np.minimum(lo, c_lo)
        hi = c_hi if hi is None else np.maximum(hi, c_hi)
        if es.success is not None:
            has_success = True
            any_true = np.logical_or.reduceat(es.success, es.offsets[:-1]) if es.num_transitions else []
            succ_ep.append(np.asarray(any_true, dtype=bool))
            task_ep.append(es.task_ids if es.task_ids is not None else np.full(es.num_episodes, -1))
        if es.rewards is not None and es.rewards.size:
            has_reward = True
            r_min, r_max = min(r_min, float(es.rewards.min())), max(r_max, float(es.rewards.max()))
            r_sum += float(es.rewards.sum(dtype=np.float64))
            r_n += int(es.rewards.size)
        if advance is not None:
            advance(es.num_transitions)

    fields = dict(source.fields)
    names = _dimension_names(fields, 0 if lo is None else lo.shape[0])
    obs_range = [{"dim": i, "field": names[i], "min": float(lo[i]), "max": float(hi[i])}
                 for i in range(0 if lo is None else lo.shape[0])]
    problems = []
    ones = int((lengths == 1).sum())
    if ones:
        problems.append(f"{ones} episode(s) have a single transition (kept; every future goal is "
                        f"their final state)")
    for d in obs_range:
        if d["min"] == d["max"]:
            label = f" ({d['field']})" if d["field"] else ""
            problems.append(f"observation dimension {d['dim']}{label} is constant ({d['min']:g}) in "
                            f"every state")
    success = None
    if has_success:
        s = np.concatenate(succ_ep)
        t = np.concatenate(task_ep)
        success = []
        for task in np.unique(t).tolist():
            sel = t == task
            success.append({"task": None if task == -1 and source.layout.keys.task is None else int(task),
                            "episodes": int(sel.sum()), "succeeded": int(s[sel].sum()),
                            "rate": float(s[sel].mean())})
        if not s.any():
            problems.append("the success flag is never true in any episode")
    return {
        "path": source.path,
        "shape": source.layout.shape,
        "convention": source.convention,
        "episodes": int(lengths.shape[0]),
        "episodes_in_log": int(getattr(source, "total_episodes", lengths.shape[0])),
        "steps": int(lengths.sum()),
        "lengths": _length_stats(lengths),
        "keys": source.key_info() if hasattr(source, "key_info") else [],
        "observation_range": obs_range,
        "success_by_task": success,
        "rewards": ({"min": r_min, "max": r_max, "mean": r_sum / r_n} if has_reward else None),
        "notes": list(source.notes),
        "skipped": [{"episode": int(e), "reason": why} for e, why in source.skipped],
        "problems": problems,
    }
