"""Threshold tuning: choose the goal-match threshold from labelled pairs, or study the goal
space without labels (diagnostics), and draw the curves. What ``goalkit tune`` and
:func:`goalkit.tune` run (the function is in :mod:`goalkit.api`; this package has its own name,
so ``goalkit.tune`` is always that function).

Modules: :mod:`~goalkit.thresholds.metrics` (sweep, ROC / PR, choosers),
:mod:`~goalkit.thresholds.bootstrap` (interval over episodes), :mod:`~goalkit.thresholds.box`
(per-dimension tolerances), :mod:`~goalkit.thresholds.labels` (where labels come from),
:mod:`~goalkit.thresholds.diagnostics` (no labels), :mod:`~goalkit.thresholds.plots` (PNG files),
:mod:`~goalkit.thresholds.tuner` (labelled tuning in one estimator),
:mod:`~goalkit.thresholds.sample` (deterministic episode sample), :mod:`~goalkit.thresholds.session`
(a recipe tuned on its own logs: what ``goalkit tune`` runs), :mod:`~goalkit.thresholds.report`
(its terminal table), :mod:`~goalkit.thresholds.recipe_edit` (the tuned copy of a recipe) and
:mod:`~goalkit.thresholds.command` (the command).
"""
