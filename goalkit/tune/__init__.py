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

import sys
import types


class _TunePackage(types.ModuleType):
    """This package, callable as :func:`goalkit.tune` (see :func:`goalkit.api.tune`).

    ``goalkit.tune`` names both the public function and this package (Python binds a
    subpackage as an attribute of its parent), so the package calls the function.
    """

    def __call__(self, recipe, **options):
        # imported here: goalkit.api imports goalkit.tune.session, which needs this package first
        from goalkit.api import tune

        return tune(recipe, **options)


sys.modules[__name__].__class__ = _TunePackage
