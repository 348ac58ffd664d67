"""Threshold tuning: choose the goal-match threshold from labelled pairs, or study the goal
space without labels (diagnostics), and draw the curves.

Modules: :mod:`~goalkit.tune.metrics` (sweep, ROC / PR, choosers),
:mod:`~goalkit.tune.bootstrap` (interval over episodes), :mod:`~goalkit.tune.box`
(per-dimension tolerances), :mod:`~goalkit.tune.labels` (where labels come from),
:mod:`~goalkit.tune.diagnostics` (no labels), :mod:`~goalkit.tune.plots` (PNG files),
:mod:`~goalkit.tune.tuner` (everything together, for the ``tune`` command).
"""
