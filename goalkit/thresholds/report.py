"""The terminal form of a ``goalkit tune`` result (:meth:`TuneResult.as_dict`)."""

from __future__ import annotations

import math

_LABELS = {"labels-file": "labelled pairs from {src}",
           "success-flags": "the logs' own success flags against their task goals",
           "no-labels": "none"}
_POINT_NAMES = {"recipe": "recipe", "suggested": "suggested", "range_low": "range low",
                "range_high": "range high"}


def _g(x, digits: int = 4) -> str:
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return "-"
    if isinstance(x, (list, tuple)):
        return "[" + ", ".join(_g(v, digits) for v in x) + "]"
    return f"{x:.{digits}g}" if isinstance(x, float) else str(x)


def _table(header, rows) -> list[str]:
    widths = [max(len(str(c)) for c in col) for col in zip(header, *rows)]
    fmt = "  ".join(f"{{:<{w}}}" for w in widths)
    return ["  " + fmt.format(*header).rstrip()] + ["  " + fmt.format(*map(str, r)).rstrip() for r in rows]


def render(d: dict) -> str:
    """Human-readable report of a tune result dictionary."""
    s = d["sample"]
    cur = d["current_rule"]
    out = [f"recipe:     {d['recipe']}",
           f"rule now:   {cur['distance']} distance, threshold {_g(cur['threshold'])}"
           f"{'' if cur['inclusive'] else ' (exclusive)'}" + _region_text(cur),
           *_mask_lines(d.get("masks")),
           f"read:       {s['episodes']:,} of {s['episodes_in_log']:,} episodes "
           f"({s['transitions']:,} of {s['transitions_in_log']:,} transitions), "
           f"{s['goal_rows']:,} goal rows relabelled with the recipe's mixture",
           "labels:     " + _LABELS[d["mode"]].format(src=d["labels_source"])]
    if not d["labels_used"]:
        out += ["", "NO LABELS USED: the numbers below describe the goal space and the recipe's",
                "goal rows only; they cannot say which threshold is right. Give --labels FILE or",
                "--from-success to choose one."]
    else:
        out += _labelled(d)
    out += _diagnostics(d)
    for n in d["notes"]:
        out.append(f"note: {n}")
    for w in d["warnings"]:
        out.append(f"warning: {w}")
    return "\n".join(out)


def _region_text(rule: dict) -> str:
    """`` (region: delta0 >= 0, ...)`` for a region rule, else empty."""
    if rule.get("distance") != "region":
        return ""
    parts = []
    for k, (lo, hi) in enumerate(zip(rule["lower"], rule["upper"])):
        if math.isfinite(lo) and math.isfinite(hi):
            parts.append(f"{_g(lo)} <= delta{k} <= {_g(hi)}")
        elif math.isfinite(lo):
            parts.append(f"delta{k} >= {_g(lo)}")
        elif math.isfinite(hi):
            parts.append(f"delta{k} <= {_g(hi)}")
    return f" (region: {', '.join(parts) or 'every dimension free'})"


def _mask_lines(masks) -> list[str]:
    """The ``masks:`` lines of a recipe with a [mask] table."""
    if not masks:
        return []
    tasks = "; ".join(f"task {t}: {', '.join(map(str, e))}" for t, e in masks["tasks"].items()) or "none"
    others = "every dimension" if masks["others"] is None else ", ".join(map(str, masks["others"]))
    return [f"masks:      per task: {tasks}; other tasks: {others}; random share "
            f"{_g(masks['random_share'])}",
            "            labelled pairs are scored on their episode's task mask (no random masks)",
            "            diagnostics use each state's episode task mask; rewarded fractions each goal "
            "row's goal_mask"]


def _labelled(d: dict) -> list[str]:
    ch = d["chosen"]
    first = next(c for c in d["candidates"] if c.get("pairs"))
    p = first["pairs"]
    eps = f", {p['episodes']:,} episodes" if p["grouped"] else ", no episode column"
    out = [f"pairs:      {p['pairs']:,} ({p['reached']:,} reached{eps})", ""]
    rows, failed = [], []
    conf = None
    for c in d["candidates"]:
        if c.get("choice") is None:
            rows.append((c["distance"], *["-"] * 8))
            failed.append(f"  {c['distance']}: not tuned: {c['error']}")
            continue
        k = c["choice"]
        iv = c["interval"]
        if iv is not None:
            conf = iv["confidence"]
        mark = " *" if c["distance"] == ch["distance"] else ""
        rows.append((c["distance"] + mark, _g(c["roc_auc"], 3), _g(c["average_precision"], 3),
                     _g(k["threshold"]), _g(k["precision"], 3), _g(k["recall"], 3), _g(k["fpr"], 3),
                     _g(k["f1"], 3),
                     "-" if iv is None else f"{_g(iv['low'])} .. {_g(iv['high'])}"))
    head = ("distance", "ROC AUC", "PR AUC", "threshold", "precision", "recall", "FPR", "F1",
            f"{conf:.0%} interval" if conf else "interval")
    out += _table(head, rows) + failed
    crit = {"f1": "largest F1", "youden": "largest TPR - FPR",
            "recall": f"largest threshold with precision >= {_g(ch['target'])}"}[ch["criterion"]]
    out.append(f"  (* chosen; {ch['chooser']}: {crit}; interval: bootstrap over episodes)")
    for c in d["candidates"]:
        if c["distance"] == d["current_rule"]["distance"] and c.get("current"):
            k = c["current"]
            out.append(f"  the recipe's threshold {_g(k['threshold'])} on these pairs: precision "
                       f"{_g(k['precision'], 3)}, recall {_g(k['recall'], 3)}, F1 {_g(k['f1'], 3)}")
    out += ["", f"suggested:  [reward] distance = \"{ch['distance']}\", threshold = {_g(ch['threshold'], 6)}"]
    if ch.get("region"):
        out.append(f"region:     reached iff {ch['region']['bounds']} (delta = achieved - goal; the bounds "
                   f"moved out by the threshold)")
    b = d["box_suggestion"]
    if b is not None:
        fa = "-" if b["false_accept"] is None or math.isnan(b["false_accept"]) else f"{b['false_accept']:.1%}"
        out.append(f"box rule:   tolerances {_g(b['tolerances'])} keep {b['recall']:.1%} of the reached "
                   f"pairs and admit {fa} of the others (precision {_g(b['precision'], 3)})")
        for n in b["notes"]:
            out.append(f"            {n}")
    return out


def _diagnostics(d: dict) -> list[str]:
    g = d["diagnostics"]
    r = d["suggested_range"]
    step = g["step_displacement"].get("quantiles", {})
    oth = g["other_episode_distance"].get("quantiles", {})
    hz = g["horizon_displacement"]
    mid = hz["quantiles"].index(0.5) if 0.5 in hz["quantiles"] else None
    out = ["", f"goal space ({g['rule']['distance']} distance{', in units of the box' if g['rule']['distance'] == 'box' else ''}):"]
    out.append(f"  change in one step:        median {_g(step.get('0.5'))}  (5%: {_g(step.get('0.05'))}, "
               f"95%: {_g(step.get('0.95'))})")
    if mid is not None:
        parts = [f"h={h}: {_g(v[mid])}" for h, v in zip(hz["horizons"], hz["values"])]
        out.append("  median change after h:    " + ", ".join(parts))
    out.append(f"  nearest other episode:     median {_g(oth.get('0.5'))}  (5%: {_g(oth.get('0.05'))}, "
               f"25%: {_g(oth.get('0.25'))})")
    out.append(f"  rule-of-thumb range:       {_g(r['low'])} .. {_g(r['high'])}"
               f"{'' if r['ok'] else '  (empty: low end above high end)'}")
    tm = r.get("temporal")
    if tm and tm.get("threshold") is not None:
        out.append(f"  temporal-order threshold:  {_g(tm['threshold'])}  (Youden's J {tm['youden_j']:.2f}: "
                   f"{tm['tpr']:.0%} of pairs <= {tm['near_steps']} step apart reached, {tm['fpr']:.0%} of pairs "
                   f">= {tm['far_steps']} steps apart; knee of the rewarded share {_g(tm['knee'])})")
    if "tolerances_low" in r and r["tolerances_low"] is not None:
        out.append(f"    as box tolerances:       {_g(r['tolerances_low'])} .. {_g(r['tolerances_high'])}")
    rf = d["rewarded_fraction"]
    labels = list(rf["thresholds"])
    head = ["strategy", "rows"] + [f"{_POINT_NAMES[k]} {_g(v)}" for k, v in rf["thresholds"].items()]
    rows = [(name, f"{s['rows']:,}", *[f"{s['fraction'][k]:.1%}" for k in labels])
            for name, s in rf["strategies"].items()]
    rows.append(("all", f"{rf['all']['rows']:,}", *[f"{rf['all']['fraction'][k]:.1%}" for k in labels]))
    out += ["", "share of goal rows rewarded, by threshold:"] + _table(head, rows)
    return out
