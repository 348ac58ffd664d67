"""Have Dask workers import what goalkit's tasks need when they start.

A worker that has never run a goalkit task imports numpy, h5py and goalkit's readers and
relabelling code when the first build's first task reaches it: about a quarter of a CPU second
per worker, taken while the build plans on the same cores (docs/scaling.md, "Eighth pass":
a first build on a fresh two-worker ``LocalCluster`` reached 1.50x one process on one CPU, a
build on workers that had imported goalkit 1.66x). A worker keeps these imports after a build,
so only a cluster's first build pays them; preloading moves them to the worker's start::

    dask worker tcp://head:8786 --preload goalkit.dask_preload
    distributed.LocalCluster(n_workers=2, threads_per_worker=1, preload=["goalkit.dask_preload"])

Nothing else is changed on the worker: no file is opened, no setting made, no thread started.
"""

from goalkit.pipeline import dask_build, poolspare  # noqa: F401  the modules of the tasks a build sends
from goalkit.pipeline.workers import warm_up

warm_up()
