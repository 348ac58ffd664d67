"""The assessment report: a plain-text table and PNG plots (the JSON form is the result's dict)."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from goalkit.outputs import is_png, save_png

#: Plot files ``goalkit assess --plots DIR`` writes (those of the sections present).
PLOT_NAMES = {"policy": "assess-action-error.png", "value": "assess-value.png"}


def plot_paths(out_dir, *, policy: bool, value: bool) -> list[Path]:
    """The PNG files an assessment writes into ``out_dir`` (for the checks before any work)."""
    out = Path(out_dir)
    return [out / PLOT_NAMES[k] for k, on in (("policy", policy), ("value", value)) if on]


def _iv(d) -> str:
    if d is None or d.get("estimate") is None:
        return "n/a"
    if d.get("low") is None:
        return f"{d['estimate']:.4g}"
    return f"{d['estimate']:.4g} [{d['low']:.4g}, {d['high']:.4g}]"


def _table(header, rows) -> list[str]:
    widths = [max(len(str(r[i])) for r in [header, *rows]) for i in range(len(header))]
    fmt = "  ".join(f"{{:<{w}}}" for w in widths)
    return [fmt.format(*r).rstrip() for r in [header, ["-" * w for w in widths], *rows]]


def render(report: dict) -> str:
    """The report as text: what was scored, the tables, and the caution."""
    pct = f"{100 * report['confidence']:g}%"
    lines = [f"assess: suite {report['suite']} ({report['rows']} rows, {report['episodes']} held-out episodes) "
             f"of set {report['set']}",
             f"intervals: {pct} percentile bootstrap over episodes, {report['resamples']} resamples, "
             f"seed {report['seed']}", ""]
    for section in ("policy", "value"):
        if section not in report:
            continue
        sec = report[section]
        ck = sec["checkpoints"]
        names = [f"{'AB'[i]}: {c}" for i, c in enumerate(ck)]
        lines.append(f"{section} checkpoints: " + "; ".join(names))
        head = ["", "rows", *("AB"[i] for i in range(len(ck)))] + (["A - B"] if len(ck) == 2 else [])
        if section == "policy":
            lines.append(f"{sec['metric']} (lower is better), by horizon bucket (steps-to-goal):")
            rows = [[b["bucket"], b["rows"], *(_iv(s) for s in b["scores"])] + (
                [_iv(b["difference"])] if len(ck) == 2 else []) for b in sec["by_bucket"]]
            o = sec["overall"]
            rows.append(["all", o["rows"], *(_iv(s) for s in o["scores"])] + ([_iv(o["difference"])] if len(ck) == 2
                                                                             else []))
        else:
            lines.append("value: Spearman with negative steps-to-goal on reachable rows, ROC AUC for reachable vs "
                         "unreachable goals (higher is better; chance: 0 and 0.5):")
            rows = [[name, sec[key]["rows"], *(_iv(s) for s in sec[key]["scores"])] + (
                [_iv(sec[key]["difference"])] if len(ck) == 2 else [])
                for key, name in (("spearman", "Spearman"), ("roc_auc", "ROC AUC"))]
        lines += ["  " + x for x in _table(head, rows)] + [""]
    lines.append("CAUTION: " + report["caution"])
    return "\n".join(lines)


def write_plots(result, out_dir, *, replace: bool = False) -> list[Path]:
    """Draw the action error by horizon bucket and the value against steps-to-goal; return the files."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    report, written = result.report, []
    note = "offline proxy: not a substitute for supervised trials on the machine"
    if "policy" in report:
        sec = report["policy"]
        fig, ax = plt.subplots(figsize=(7, 4.2), layout="constrained")
        labels = [b["bucket"] for b in sec["by_bucket"]]
        x = np.arange(len(labels))
        n = len(sec["checkpoints"])
        for i, spec in enumerate(sec["checkpoints"]):
            est = np.array([np.nan if b["scores"][i]["estimate"] is None else b["scores"][i]["estimate"]
                            for b in sec["by_bucket"]])
            lo = np.array([np.nan if b["scores"][i]["low"] is None else b["scores"][i]["low"] for b in sec["by_bucket"]])
            hi = np.array([np.nan if b["scores"][i]["high"] is None else b["scores"][i]["high"]
                           for b in sec["by_bucket"]])
            ax.errorbar(x + (i - (n - 1) / 2) * 0.15, est, yerr=[np.nan_to_num(est - lo), np.nan_to_num(hi - est)],
                        fmt="o", capsize=4, label=f"{'AB'[i]}: {spec}")
        ax.set_xticks(x, labels)
        ax.set_xlabel("horizon bucket (steps-to-goal)")
        ax.set_ylabel("action error (Euclidean)")
        ax.set_title(f"policy action error, {100 * report['confidence']:g}% intervals over episodes\n{note}",
                     fontsize=9)
        ax.legend(fontsize=8)
        written.append(save_png(fig, out / PLOT_NAMES["policy"], replace=replace))
        plt.close(fig)
    if "value" in report:
        sec = report["value"]
        cols = result.suite_columns
        reach = cols["reachable"].astype(bool) & (cols["horizon"] > 0)
        fig, ax = plt.subplots(figsize=(7, 4.2), layout="constrained")
        for i, spec in enumerate(sec["checkpoints"]):
            v = result.predictions["value"][i]
            rho = sec["spearman"]["scores"][i]["estimate"]
            ax.scatter(-cols["horizon"][reach], v[reach], s=8, alpha=0.6,
                       label=f"{'AB'[i]}: {spec} (Spearman {rho if rho is None else round(rho, 3)})")
        ax.set_xlabel("negative steps-to-goal (reachable held-out pairs)")
        ax.set_ylabel("predicted value")
        ax.set_title(f"value against steps-to-goal\n{note}", fontsize=9)
        ax.legend(fontsize=8)
        written.append(save_png(fig, out / PLOT_NAMES["value"], replace=replace))
        plt.close(fig)
    return written


__all__ = ["PLOT_NAMES", "is_png", "plot_paths", "render", "write_plots"]
