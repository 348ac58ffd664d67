"""The invented demo scenario: an irrigation gantry over a seedling bench.

A nozzle head moves in x-y-z above a bench (acceleration commands, damped velocity, clipped
workspace); seedling trays slide along the bench only when the lowered head pushes them.
Tasks are "water tray k" and "slide tray k into the light strip". See ``docs/demo.md``.

Examples
--------
>>> import tempfile
>>> from goalkit.demo import make_demo
>>> out = make_demo(tempfile.mkdtemp(), episodes=3)
>>> out["episodes"]
3
"""

from goalkit.demo.bench import BenchState, GantryParams, pushing, step
from goalkit.demo.camera import render
from goalkit.demo.controllers import (CONTROLLERS, act, noisy_action, random_action,
                                      scripted_action)
from goalkit.demo.files import make_demo, write_demo
from goalkit.demo.simulate import Rollouts, simulate
from goalkit.demo.tasks import success_flags, task_goals, task_name

__all__ = ["BenchState", "GantryParams", "step", "pushing", "render", "CONTROLLERS", "act",
           "scripted_action", "noisy_action", "random_action", "make_demo", "write_demo",
           "Rollouts", "simulate", "success_flags", "task_goals", "task_name"]
