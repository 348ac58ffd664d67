"""Threshold tuning: choose the goal-match threshold from labelled pairs, or study the goal
space without labels (diagnostics), and draw the curves.

Modules: :mod:`~goalkit.tune.metrics` (sweep, ROC / PR, choosers),
:mod:`~goalkit.tune.bootstrap` (interval over episodes), :mod:`~goalkit.tune.box`
(per-dimension tolerances), :mod:`~goalkit.tune.labels` (where labels come from),
:mod:`~goalkit.tune.diagnostics` (no labels), :mod:`~goalkit.tune.plots` (PNG files),
:mod:`~goalkit.tune.tuner` (labelled tuning in one estimator),
:mod:`~goalkit.tune.sample` (deterministic episode sample), :mod:`~goalkit.tune.session`
(a recipe tuned on its own logs: what ``goalkit tune`` runs), :mod:`~goalkit.tune.report`
(its terminal table), :mod:`~goalkit.tune.recipe_edit` (the tuned copy of a recipe) and
:mod:`~goalkit.tune.command` (the command).
"""
