"""Offline scoring of a trained goal-conditioned policy or value function on a held-out suite.

Modules: :mod:`~goalkit.scoring.entry` (loading and calling the user's callables),
:mod:`~goalkit.scoring.metrics` (action error, Spearman, ROC AUC, episode bootstrap),
:mod:`~goalkit.scoring.run` (:func:`assess_suite`), :mod:`~goalkit.scoring.report` (table,
PNGs), :mod:`~goalkit.scoring.command` (``goalkit assess``). See docs/suites.md.
"""
