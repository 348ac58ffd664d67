"""Tune's plots read back as matplotlib figures: axis limits, named distances, labels inside.

Checked on the Figure objects the plots are saved from (matplotlib's own layout engine gives each
text's window extent in display pixels; the figure's bbox is the saved canvas).
"""

from __future__ import annotations

import numpy as np

from goalkit.errors import ParameterError, shown
from goalkit.goals.goalmap import IndexGoalMap
from goalkit.logs.episodes import EpisodeSet
from goalkit.reward import RewardRule
from goalkit.thresholds.diagnostics import diagnose, rewarded_fraction
from goalkit.thresholds.metrics import choose_threshold, sweep_thresholds
from goalkit.thresholds.plots import diagnostic_figures, labelled_figures, threshold_window
from goalkit.write.card import coverage_figure, project


def _texts_inside(fig):
    """Names of the axes whose drawn artists (title, axis labels, drawn tick labels, legend) reach
    outside the figure; empty when every label is inside it.

    ``Axes.get_tightbbox`` is matplotlib's extent of what an Axes draws (tick labels outside the
    view are not drawn and not counted); the figure's bbox is the saved canvas.
    """
    fig.canvas.draw()
    renderer = fig.canvas.get_renderer()
    box = fig.bbox
    outside = []
    for ax in fig.axes:
        ext = ax.get_tightbbox(renderer)
        if ext.x0 < box.x0 - 0.5 or ext.y0 < box.y0 - 0.5 or ext.x1 > box.x1 + 0.5 or ext.y1 > box.y1 + 0.5:
            outside.append(ax.get_title() or ax.get_ylabel())
    return outside


def _far_reaching_pairs(seed=0):
    # Invented irrigation-gantry pairs whose distances run far past the chosen threshold (the
    # sweep reaches about 1.65 while the choice sits near 0.04, as on the demo).
    r = np.random.default_rng(seed)
    n = 600
    y = r.random(n) < 0.4
    d = np.where(y, r.uniform(0, 0.05, n), r.uniform(0.03, 1.65, n))
    return d, y


def test_f1_axis_runs_around_the_chosen_and_current_thresholds():
    d, y = _far_reaching_pairs()
    sweep = sweep_thresholds(d, y)
    choice = choose_threshold(sweep)
    assert sweep.thresholds.max() > 1.5 and choice.threshold < 0.1
    figs = labelled_figures(sweep, choice, current=sweep.at(0.04), distance="euclidean")
    lo, hi = figs["f1"].axes[0].get_xlim()
    marked = [choice.threshold, 0.04]
    assert lo <= min(marked) and max(marked) <= hi
    # the marked points are not squeezed into the left edge: the largest lies past a quarter of the axis
    assert (max(marked) - lo) / (hi - lo) >= 0.25
    for kind, fig in figs.items():
        assert "euclidean distance" in fig.axes[0].get_title(), kind
        assert _texts_inside(fig) == [], kind
    assert "euclidean distance" in figs["f1"].axes[0].get_xlabel()


def test_threshold_window_edge_cases():
    t = np.linspace(0, 1.65, 50)
    assert threshold_window([0.04], t) == (0.0, 0.12 * 1.02)
    assert threshold_window([1.6], t)[1] >= 1.6 * 1.25  # never cuts a marked point off
    assert threshold_window([0.0], t) == (0.0, 1.65 * 1.02)  # nothing positive marked: the whole sweep


def _episodes():
    # Invented gantry episodes: the head (x, y, z) drifting towards a tray.
    r = np.random.default_rng(4)
    lengths = np.full(12, 30)
    obs = np.cumsum(r.normal(scale=0.01, size=(int(lengths.sum() + len(lengths)), 3)), axis=0)
    return EpisodeSet(observations=obs, actions=r.normal(size=(int(lengths.sum()), 3)),
                      offsets=np.r_[0, np.cumsum(lengths)].astype(np.int64), episode_ids=np.arange(12))


def test_diagnostic_plots_name_the_distance_and_whose_threshold_and_keep_labels_inside():
    ep = _episodes()
    gm = IndexGoalMap([0, 1, 2])
    rule = RewardRule("chebyshev", 0.02)
    diag = diagnose(ep, gm, rule, horizons=[1, 2, 4], sample=100)
    g = gm(ep, np.arange(ep.observations.shape[0]))
    curve = rewarded_fraction(g[1:], g[:-1], np.zeros(len(g) - 1, np.int64), rule, np.linspace(0, 0.1, 20))
    for owner in ("recipe", "suggested"):
        figs = diagnostic_figures(diag, rewarded=curve, strategy_names={0: "future"}, distance="chebyshev",
                                  threshold_owner=owner)
        for kind, fig in figs.items():
            ax = fig.axes[0]
            assert "chebyshev distance" in ax.get_title(), kind
            assert _texts_inside(fig) == [], kind
        legend = [t.get_text() for t in figs["rewarded"].axes[0].get_legend().get_texts()]
        assert f"{owner} threshold 0.02" in legend


def test_a_long_y_label_is_not_clipped():
    coords, ratio = project({"train": np.random.default_rng(0).normal(size=(50, 4)),
                             "validation": np.random.default_rng(1).normal(size=(10, 4))})
    fig = coverage_figure(coords, ratio)
    fig.axes[0].set_ylabel("a long label: " + "distance after h steps " * 2)
    fig.tight_layout()
    assert _texts_inside(fig) == []


def test_messages_show_numbers_plainly():
    # numpy 2 prints np.float32(1.0) as its repr; messages must say 1.0
    assert shown(np.float32(1.0)) == "1.0" and shown([np.int64(2), np.float64(0.5)]) == "[2, 0.5]"
    try:
        RewardRule("euclidean", [np.float64(0.1), np.float64(0.2)])
    except ParameterError as exc:
        assert "np." not in str(exc) and "[0.1, 0.2]" in str(exc)
    else:  # pragma: no cover
        raise AssertionError("a list threshold for euclidean must be refused")
