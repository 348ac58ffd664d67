"""PNG plots of threshold tuning, drawn with matplotlib's Agg canvas (no pyplot, no display).

File names are fixed (see :data:`FILE_NAMES`, with an optional prefix), so a rerun with
``replace`` (``tune --replace``) replaces the same files; an existing file that is not a PNG is
never replaced. Each file is written through :mod:`goalkit.outputs` (an exclusive temporary
name in the same directory, then published), so an interrupted run never leaves a half-written
PNG. PNG metadata carries no software version, so the same inputs give the same bytes with one
matplotlib.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

from goalkit.outputs import is_png, save_png

#: plot kind -> file name.
FILE_NAMES = {
    "roc": "threshold-roc.png",
    "pr": "threshold-precision-recall.png",
    "f1": "threshold-f1.png",
    "step": "goal-step-displacement.png",
    "horizon": "goal-horizon-displacement.png",
    "other": "goal-other-episode-distance.png",
    "rewarded": "goal-rewarded-fraction.png",
}


def _figure(width=5.0, height=4.0):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), dpi=100)
    FigureCanvasAgg(fig)
    ax = fig.add_subplot(1, 1, 1)
    ax.title.set_fontsize(11)
    return fig, ax


LABELLED_KINDS = ("roc", "pr", "f1")
DIAGNOSTIC_KINDS = ("step", "horizon", "other", "rewarded")


def plot_paths(out_dir, distances, labelled: bool, prefix: str = "") -> list[Path]:
    """Every file a tune run may write into ``out_dir`` (for the checks before any work).

    Labelled plots carry no distance prefix when one candidate is tuned, else ``DISTANCE-``;
    both forms are listed when several distances are tried, since failed candidates are not
    plotted.
    """
    out = Path(out_dir)
    prefixes = {prefix} | ({f"{prefix}{d}-" for d in distances} if len(distances) > 1 else set())
    names = [f"{p}{FILE_NAMES[k]}" for p in sorted(prefixes) for k in LABELLED_KINDS] if labelled else []
    names += [f"{prefix}{FILE_NAMES[k]}" for k in DIAGNOSTIC_KINDS]
    return [out / n for n in names]


def _target(out_dir, kind, prefix) -> Path:
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    return out / f"{prefix}{FILE_NAMES[kind]}"


def _distance_text(distance) -> str:
    if not distance:
        return "distance"
    return "box distance, in tolerance units" if distance == "box" else f"{distance} distance"


def threshold_window(marked, thresholds) -> tuple[float, float]:
    """x-limits of a threshold axis around the marked thresholds.

    From 0 to three times the largest marked threshold (so the largest marked point lies at a
    third of the axis or further right, never squeezed against its left end), cut at the largest
    swept threshold but always past the marked points; the whole sweep when nothing positive is
    marked.
    """
    top_sweep = float(np.max(thresholds)) if len(thresholds) else 1.0
    pts = [float(m) for m in marked if m is not None and np.isfinite(m)]
    m = max(pts) if pts else 0.0
    high = max(min(3.0 * m, top_sweep), 1.25 * m) if m > 0 else top_sweep
    if not high > 0:
        high = 1.0
    low = 0.0
    return low, high * 1.02


def labelled_figures(sweep, choice, *, current=None, distance=None) -> dict:
    """The ROC, precision-recall and F1-versus-threshold figures (matplotlib Figures, laid out).

    Parameters
    ----------
    sweep : ThresholdSweep
    choice : ThresholdChoice
    current : dict, optional
        :meth:`ThresholdSweep.at` of the recipe's current threshold, marked too.
    distance : str, optional
        The distance these thresholds are of, named in every title.
    """
    figs = {}
    k = choice.index
    dname = _distance_text(distance)
    fig, ax = _figure()
    fpr, tpr = sweep.roc_curve()
    ax.plot(fpr, tpr, color="tab:blue", lw=1.5, label=f"ROC (AUC {sweep.roc_auc():.3f})")
    ax.plot([0, 1], [0, 1], color="0.7", lw=0.8, ls="--")
    ax.plot([choice.fpr], [choice.recall], "o", color="tab:red",
            label=f"{choice.chooser}: {choice.threshold:.4g}")
    if current is not None:
        ax.plot([current["fpr"]], [current["recall"]], "s", color="tab:green",
                label=f"current: {current['threshold']:.4g}")
    ax.set(xlabel="false positive rate", ylabel="true positive rate", xlim=(0, 1), ylim=(0, 1.02),
           title=f"Goal-match ROC\n({dname})")
    ax.legend(loc="lower right", fontsize=8)
    figs["roc"] = fig

    fig, ax = _figure()
    ax.step(np.r_[0.0, sweep.recall], np.r_[sweep.precision[0], sweep.precision], where="pre",
            color="tab:blue", lw=1.5, label=f"AP {sweep.average_precision():.3f}")
    ax.plot([choice.recall], [choice.precision], "o", color="tab:red",
            label=f"{choice.chooser}: {choice.threshold:.4g}")
    if current is not None and np.isfinite(current["precision"]):
        ax.plot([current["recall"]], [current["precision"]], "s", color="tab:green",
                label=f"current: {current['threshold']:.4g}")
    ax.set(xlabel="recall", ylabel="precision", xlim=(0, 1), ylim=(0, 1.02),
           title=f"Precision-recall\n({dname})")
    ax.legend(loc="lower left", fontsize=8)
    figs["pr"] = fig

    fig, ax = _figure()
    ax.plot(sweep.thresholds, sweep.f1, color="tab:blue", lw=1.5, label="F1")
    ax.plot(sweep.thresholds, sweep.precision, color="tab:orange", lw=1.0, label="precision")
    ax.plot(sweep.thresholds, sweep.recall, color="tab:purple", lw=1.0, label="recall")
    ax.axvline(choice.threshold, color="tab:red", lw=1.0, ls="--")
    ax.plot([choice.threshold], [sweep.f1[k]], "o", color="tab:red",
            label=f"{choice.chooser}: {choice.threshold:.4g}")
    marked = [choice.threshold]
    if current is not None:
        ax.axvline(current["threshold"], color="tab:green", lw=1.0, ls=":",
                   label=f"current: {current['threshold']:.4g}")
        marked.append(current["threshold"])
    ax.set(xlabel=f"threshold ({dname})", ylabel="score", ylim=(0, 1.02), xlim=threshold_window(marked, sweep.thresholds),
           title=f"Scores by threshold\n({dname})")
    ax.legend(loc="best", fontsize=8)
    figs["f1"] = fig
    for f in figs.values():
        f.tight_layout()
    return figs


def plot_labelled(sweep, choice, out_dir, *, prefix: str = "", current=None, replace: bool = False,
                  distance=None) -> dict[str, Path]:
    """Draw ROC, precision-recall and F1-versus-threshold curves with the choice marked.

    Parameters
    ----------
    sweep : ThresholdSweep
    choice : ThresholdChoice
    out_dir : str or Path
        Directory (created if missing).
    prefix : str
        Prepended to every file name.
    current : dict, optional
        :meth:`ThresholdSweep.at` of the recipe's current threshold, marked too.
    replace : bool
        Replace existing PNG files of the same names.
    distance : str, optional
        The distance the thresholds are of (named in the titles and the threshold axis).

    Returns
    -------
    dict of str to Path
        Plot kind -> file written.
    """
    figs = labelled_figures(sweep, choice, current=current, distance=distance)
    return {kind: save_png(fig, _target(out_dir, kind, prefix), replace) for kind, fig in figs.items()}


def diagnostic_figures(diagnostics, *, rewarded=None, strategy_names=None, distance=None,
                       threshold_owner: str = "recipe") -> dict:
    """The label-free diagnostic figures (and the rewarded fraction, when given), laid out.

    Parameters
    ----------
    diagnostics : Diagnostics
    rewarded : RewardedFraction, optional
    strategy_names : mapping of int to str, optional
        Legend names of strategy codes.
    distance : str, optional
        The distance of the threshold (named in titles and axes).
    threshold_owner : str
        Whose threshold the marked line is (``"recipe"``, ``"suggested"``), said in its legend.
    """
    figs = {}
    thr = diagnostics.threshold
    dname = _distance_text(distance)
    line = f"{threshold_owner} threshold {thr:.4g}"
    fig, ax = _figure()
    step = diagnostics.step[np.isfinite(diagnostics.step)]
    if step.size:
        ax.hist(step, bins=50, color="tab:blue", alpha=0.8)
    ax.axvline(thr, color="tab:red", ls="--", label=line)
    ax.set(xlabel=f"one-step displacement ({dname})", ylabel="transitions",
           title=f"Goal change per step\n({dname})")
    ax.legend(fontsize=8)
    figs["step"] = fig

    fig, ax = _figure()
    hp = diagnostics.horizon
    for j, q in enumerate(hp.quantiles.tolist()):
        ax.plot(hp.horizons, hp.values[:, j], marker="o", ms=3, lw=1.0, label=f"q {q:g}")
    ax.axhline(thr, color="tab:red", ls="--", label=line)
    ax.set_xscale("log", base=2)
    ax.set(xlabel="horizon h (steps)", ylabel=f"{dname} after h steps", title=f"Goal change by horizon\n({dname})")
    ax.legend(fontsize=8)
    figs["horizon"] = fig

    fig, ax = _figure()
    oth = diagnostics.other.distance[np.isfinite(diagnostics.other.distance)]
    if oth.size:
        ax.hist(oth, bins=50, color="tab:blue", alpha=0.8)
    ax.axvline(thr, color="tab:red", ls="--", label=line)
    ax.set(xlabel=f"{dname} to nearest state of another episode", ylabel="sampled states",
           title=f"Separation between episodes\n({dname})")
    ax.legend(fontsize=8)
    figs["other"] = fig

    if rewarded is not None:
        fig, ax = _figure()
        names = strategy_names or {}
        for i, code in enumerate(rewarded.strategies.tolist()):
            ax.plot(rewarded.thresholds, rewarded.fraction[i], lw=1.2, label=names.get(code, str(code)))
        ax.axvline(thr, color="tab:red", ls="--", label=line)
        ax.set(xlabel=f"threshold ({dname})", ylabel="fraction rewarded", ylim=(0, 1.02),
               title=f"Rewarded goal rows by strategy\n({dname})")
        ax.legend(fontsize=8)
        figs["rewarded"] = fig
    for f in figs.values():
        f.tight_layout()
    return figs


def plot_diagnostics(diagnostics, out_dir, *, prefix: str = "", rewarded=None,
                     strategy_names=None, replace: bool = False, distance=None,
                     threshold_owner: str = "recipe") -> dict[str, Path]:
    """Draw the label-free diagnostics (and the rewarded fraction, when given).

    Parameters
    ----------
    diagnostics : Diagnostics
    out_dir : str or Path
    prefix : str
    rewarded : RewardedFraction, optional
    strategy_names : mapping of int to str, optional
        Legend names of strategy codes.
    replace : bool
        Replace existing PNG files of the same names.
    distance : str, optional
        The distance of the threshold (named in titles and axes).
    threshold_owner : str
        Whose threshold the marked line is: ``"recipe"`` (tuning without labels) or
        ``"suggested"`` (the threshold tuned from labels).
    """
    figs = diagnostic_figures(diagnostics, rewarded=rewarded, strategy_names=strategy_names, distance=distance,
                              threshold_owner=threshold_owner)
    return {kind: save_png(fig, _target(out_dir, kind, prefix), replace) for kind, fig in figs.items()}
