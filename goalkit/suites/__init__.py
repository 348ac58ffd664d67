"""Held-out goal suites: small files of (state, goal, horizon, reachable) rows drawn from a set's
validation split, stratified by what makes a goal hard (docs/suites.md).

Modules: :mod:`~goalkit.suites.strata` (buckets and the seeded choice per cell),
:mod:`~goalkit.suites.reach` (which goals the held-out episodes reach, alone or joined),
:mod:`~goalkit.suites.fileformat` (the suite file and its card), :mod:`~goalkit.suites.make`
(from a set to a suite), :mod:`~goalkit.suites.command` (``goalkit suite``).
"""
