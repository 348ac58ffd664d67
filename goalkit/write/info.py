"""The facts of a built set, read from its stored attributes alone (``goalkit info``, the card).

Nothing is re-derived and no column is read: the facts come from the root attributes (recipe,
seed, provenance, summary), the split groups' ``rows`` / ``episodes`` attributes and the columns'
shapes (HDF5 metadata). Opening a set and collecting them takes milliseconds whatever its size.
Sets built before a fact was stored give None for it, and :func:`set_facts` lists it under
``"not_stored"`` so a reader is told what cannot be shown.
"""

from __future__ import annotations

import os
import shlex
import tomllib
from pathlib import Path

from goalkit.rows import SPLITS
from goalkit.write.reader import GoalSet

#: Columns whose stored dtype a recipe chooses ([output] observation_dtype, action_dtype; [goal] dtype).
DTYPE_COLUMNS = ("observation", "action", "next_observation", "goal")

#: The caution that goes with every set (the README's "Safety" section, shortened).
SAFETY = ("A set built with goalkit trains policies that may drive real machines. goalkit checks that "
          "the set is consistent with its logs and recipe; it cannot tell whether the logged behaviour, "
          "the goals or the reward threshold are safe for your robot. Validate every policy trained on it "
          "in simulation first, then on hardware under supervision with an emergency stop within reach; "
          "follow the robot-safety standards and local regulations that apply, and defer to qualified "
          "safety engineers on every decision about running a policy on real hardware.")

#: What a set is for (the motivation section of the card).
PURPOSE = ("Offline training of goal-conditioned policies and value functions: each row pairs a logged "
           "transition (s_t, a_t, s_t+1) with a goal g and the reward of reaching it, under the reward "
           "rule below. Goals were relabelled in hindsight from the logs by the strategies listed; "
           "episodes are split between train and validation, never shared.")


def _num(value):
    """A plain Python number (never a numpy scalar) for messages and JSON."""
    if hasattr(value, "item"):
        value = value.item()
    return value


def set_facts(path) -> dict:
    """Collect a set's card facts from its stored attributes (nothing re-derived).

    Parameters
    ----------
    path : str or Path
        A set written by ``goalkit build``.

    Returns
    -------
    dict
        JSON-able: ``path``, ``file_bytes``, ``format_version``, ``goalkit_version``, ``mode``,
        ``seed``, ``purpose``, ``rebuild_command``, ``recipe_file``, ``recipe``, ``reward``,
        ``goal_map``, ``relabel``, ``split``, ``widths``, ``dtypes`` (stored dtype of the
        observation, action, next_observation and goal columns; None where not stored), ``rows``,
        ``by_source`` (recipes with ``[[sources]]``: per source episodes, transitions, goal rows per
        transition and rows per split; else None), ``episodes``,
        ``strategies``, ``heads``, ``reached_fraction``, ``by_split``, ``goal_distance_histogram``,
        ``horizon_histogram``, ``goal_distance_quantiles``, ``sources``, ``limits``,
        ``safety``, ``not_stored`` (names of the facts this set does not hold).

    Raises
    ------
    DatasetError
        When the file is missing or not a readable goalkit set.
    """
    path = Path(path)
    with GoalSet(path) as gs:
        summary, prov = gs.summary, gs.provenance
        comp = summary.get("composition") if isinstance(summary.get("composition"), dict) else {}
        rows = {s: gs.rows(s) for s in SPLITS}
        episodes = {}
        for s in SPLITS:
            value = gs.file[s].attrs.get("episodes")
            episodes[s] = int(value) if value is not None else None
        shapes, dtypes = {}, {}
        for s in SPLITS:
            group = gs.file[s]
            for name, key in (("goal", "goal"), ("observation", "observation"), ("action", "action")):
                if key in group and name not in shapes:
                    shapes[name] = [int(x) for x in group[key].shape[1:]]
            for name in DTYPE_COLUMNS:
                if name in group and name not in dtypes:
                    dtypes[name] = str(group[name].dtype)
        version = gs.stored.version
        facts = {
            "path": str(path),
            "file_bytes": os.stat(path).st_size,
            "format_version": version,
            "goalkit_version": gs.stored.goalkit_version,
            "mode": gs.mode,
            "seed": int(gs.seed),
            "purpose": PURPOSE,
            "recipe_file": prov.get("recipe_file") or None,
            "recipe": gs.recipe,
            "reward": prov.get("reward"),
            "goal_map": prov.get("goal_map"),
            "relabel": prov.get("relabel"),
            "split": prov.get("split"),
            "widths": comp.get("widths") or ({k: shapes[k] for k in ("observation", "action", "goal")}
                                             if len(shapes) == 3 else None),
            "dtypes": {name: dtypes.get(name) for name in DTYPE_COLUMNS},
            "rows": rows,
            "by_source": summary.get("sources"),
            "episodes": episodes,
            "transitions": prov.get("transitions"),
            "strategies": summary.get("strategies"),
            "heads": head_facts(summary.get("heads"), gs.recipe),
            "reached_fraction": summary.get("reached_fraction"),
            "by_split": comp.get("by_split"),
            "goal_distance_histogram": comp.get("goal_distance_histogram"),
            "horizon_histogram": comp.get("horizon_histogram"),
            "goal_distance_quantiles": summary.get("goal_distance_quantiles"),
            "goal_distance_sample_rows": summary.get("goal_distance_sample_rows"),
            "sources": {"logs_path": prov.get("logs_path"), "layout_path": prov.get("layout_path") or None,
                        "log_files": prov.get("log_files"), "embedding_files": prov.get("embedding_files"),
                        "counts": comp.get("sources")},
            "limits": {"skipped_episodes": prov.get("skipped_episodes", []),
                       "warnings": summary.get("warnings", []), "log_notes": prov.get("log_notes", [])},
            "safety": SAFETY,
        }
    if facts["widths"] is None and "goal" in shapes:
        facts["widths"] = {"observation": None, "action": None, "goal": shapes["goal"]}
    facts["rebuild_command"] = rebuild_command(facts)
    missing = [k for k in ("by_split", "goal_distance_histogram", "horizon_histogram") if facts[k] is None]
    if facts["sources"]["counts"] is None:
        missing.append("sources.counts")
    if facts["widths"] is None or None in facts["widths"].values():
        missing.append("widths")
    facts["not_stored"] = missing
    return facts


def head_facts(counts, recipe_text: str):
    """Goal heads of a set built with ``[output] goals = "heads"`` (None otherwise).

    ``[{"name", "rows", "reached_fraction", "sources": {source: {"rows", "reached"}}, "weights",
    "gamma", "past_end", "steps"}, ...]`` in the heads' order: the summary's counts with the head's ``[heads.NAME]`` table
    from the stored recipe (defaults of docs/recipe.md where a key is not written).
    """
    if not counts:
        return None
    try:
        tables = tomllib.loads(recipe_text).get("heads", {})
    except (tomllib.TOMLDecodeError, TypeError):
        tables = {}
    out = []
    for c in counts:
        t = tables.get(c["name"], {}) if isinstance(tables, dict) else {}
        out.append({**c, "weights": t.get("weights", {"geometric": 1}), "gamma": t.get("gamma", 0.99),
                     "past_end": t.get("past_end", "clip"), "steps": t.get("steps", 25)})
    return out


def heads_lines(heads) -> list[str]:
    """One line per goal head: source shares, discount, past-end rule, subgoal steps, reached share."""
    out = []
    for h in heads or []:
        name = h["name"]
        total = max(int(h["rows"]), 1)
        shares = ", ".join(f"{src} {c['rows'] / total:.1%}" for src, c in h["sources"].items())
        extra = f", subgoal k = {h['steps']}" if "subgoal" in h["sources"] else ""
        out.append(f"{name}: {shares}; gamma {h['gamma']:g}, {h['past_end']}{extra}; reached "
                   f"{h['reached_fraction']:.1%} (columns FIELD@{name})")
    return out


def rebuild_command(facts: dict) -> str | None:
    """The command that rebuilds the set at its path (recipe file, output path and seed)."""
    recipe = facts.get("recipe_file")
    if not recipe:
        return None
    return shlex.join(["goalkit", "build", str(recipe), "--out", str(Path(facts["path"]).resolve()),
                       "--seed", str(facts["seed"]), "--replace"])


def _size(n: int) -> str:
    for unit in ("bytes", "KiB", "MiB", "GiB"):
        if n < 1024 or unit == "GiB":
            return f"{n:,} {unit}" if unit == "bytes" else f"{n:.1f} {unit}"
        n /= 1024
    return f"{n}"  # pragma: no cover


def reward_text(reward: dict | None) -> str:
    """One line for a reward rule: distance, threshold (inclusive or not), form."""
    if not reward:
        return "not stored"
    thr = reward.get("threshold")
    thr = ", ".join(f"{_num(x):g}" for x in thr) if isinstance(thr, list) else f"{_num(thr):g}"
    op = "<=" if reward.get("inclusive", True) else "<"
    extra = "; ends the episode on reach" if reward.get("end_on_reach") else ""
    return f"{reward.get('distance')} distance {op} {thr}, {reward.get('form')} reward{extra}"


def widths_text(widths: dict | None) -> str:
    """``observation 9, action 3, goal 6`` (shapes with several axes as ``32x32``)."""
    if not widths:
        return "not stored"
    parts = []
    for k in ("observation", "action", "goal"):
        v = widths.get(k)
        parts.append(f"{k} {'not stored' if v is None else 'x'.join(str(x) for x in v) or 'scalar'}")
    return ", ".join(parts)


def dtypes_text(dtypes: dict | None) -> str:
    """``observation float32, action int16, next_observation float32, goal float32``."""
    if not dtypes:
        return "not stored"
    return ", ".join(f"{k} {dtypes.get(k) or 'not stored'}" for k in DTYPE_COLUMNS)


def format_info(facts: dict) -> str:
    """The human-readable ``goalkit info`` report of :func:`set_facts`."""
    rows, eps = facts["rows"], facts["episodes"]
    lines = [f"{facts['path']}: goalkit set (format {facts['format_version']}, goalkit "
             f"{facts['goalkit_version']}), {facts['mode']}, {_size(facts['file_bytes'])}",
             f"  rows: {rows['train']:,} train, {rows['validation']:,} validation "
             f"(episodes: {eps['train']} train, {eps['validation']} validation)",
             f"  reward: {reward_text(facts['reward'])}",
             f"  widths: {widths_text(facts['widths'])}",
             f"  dtypes: {dtypes_text(facts.get('dtypes'))}",
             f"  seed: {facts['seed']}",
             f"  rebuild: {facts['rebuild_command'] or 'not stored (the recipe file is not recorded)'}"]
    if facts["reached_fraction"] is not None:
        lines.append(f"  reached (all rows): {facts['reached_fraction']:.1%}")
    if facts["by_split"]:
        lines.append("  strategy          train rows  reached   validation rows  reached")
        names = list(dict.fromkeys([*facts["by_split"]["train"], *facts["by_split"]["validation"]]))
        for name in names:
            cells = []
            for s in SPLITS:
                c = facts["by_split"][s].get(name, {"rows": 0, "reached": 0})
                share = f"{c['reached'] / c['rows']:.1%}" if c["rows"] else "-"
                cells.append((c["rows"], share))
            lines.append(f"  {name:<15} {cells[0][0]:>12,} {cells[0][1]:>8} {cells[1][0]:>17,} {cells[1][1]:>8}")
    elif facts["strategies"]:
        lines.append("  strategy          rows        reached")
        for name, s in facts["strategies"].items():
            lines.append(f"  {name:<15} {s['rows']:>10,}   {s['reached_fraction']:>8.1%}")
    for name, v in (facts.get("by_source") or {}).items():
        k = v.get("goals_per_transition")
        lines.append(f"  source {name}: {v['episodes']:,} episodes, {v['transitions']:,} transitions"
                     + (f", {k} goal rows each" if k is not None else "")
                     + f", rows {v['rows']['train']:,} train / {v['rows']['validation']:,} validation")
    if facts.get("heads"):
        lines.append("  heads (one row per transition, a goal per head):")
        lines += [f"    {line}" for line in heads_lines(facts["heads"])]
    h = facts["horizon_histogram"]
    if h:
        for s in SPLITS:
            cells = [f"{lo}-{2 * lo - 1}: {n:,}" if lo > 1 else f"1: {n:,}" for lo, n in zip(h["low"], h["counts"][s])]
            lines.append(f"  steps-to-goal ({s}): {'  '.join(cells)}  (none: {h['none'][s]:,})")
    d = facts["goal_distance_histogram"]
    if d:
        for s in SPLITS:
            labels = [f"<={r:g}" for r in d["ratios"]] + [f">{d['ratios'][-1]:g}"]
            cells = [f"{lab}: {n:,}" for lab, n in zip(labels, d["counts"][s])]
            lines.append(f"  goal distance / {d['unit']:g} ({s}): {'  '.join(cells)}")
    src = facts["sources"]
    files = src.get("log_files") or []
    lines.append(f"  logs: {src.get('logs_path')} ({len(files)} file{'' if len(files) == 1 else 's'})")
    for f in files[:5]:
        beside = f"  (from the set's folder: {f['relative']})" if isinstance(f, dict) and f.get("relative") else ""
        lines.append(f"    {f['path']}  {f['bytes']:,} bytes  sha256 {f['sha256'][:16]}...{beside}")
    if len(files) > 5:
        lines.append(f"    ... and {len(files) - 5} more (--json lists them all)")
    lim = facts["limits"]
    lines.append(f"  skipped episodes: {len(lim['skipped_episodes'])}")
    for w in lim["warnings"]:
        lines.append(f"  warning: {w}")
    if facts["not_stored"]:
        lines.append(f"  not stored in this set (built before goalkit stored them; rebuild to get them): "
                     f"{', '.join(facts['not_stored'])}")
    lines.append(f"  safety: {facts['safety']}")
    return "\n".join(lines)


def info(path) -> dict:
    """The facts of a built set, from the file alone, in milliseconds (``goalkit info``).

    Parameters
    ----------
    path : str or Path

    Returns
    -------
    dict
        See :func:`set_facts`.

    Examples
    --------
    >>> facts = goalkit.info("gantry-goals.h5")           # doctest: +SKIP
    >>> facts["rows"]["train"], facts["reward"]["threshold"]  # doctest: +SKIP
    (10440, 0.04)
    """
    return set_facts(path)


__all__ = ["DTYPE_COLUMNS", "PURPOSE", "SAFETY", "dtypes_text", "format_info", "info", "rebuild_command", "reward_text",
           "set_facts", "widths_text"]
