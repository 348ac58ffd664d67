"""The first module the local workers' fork server imports: one math-library thread.

Importing it sets the unset thread-count variables of this process to 1
(:func:`goalkit.threadenv.limit_this_process`), so the numpy the server imports next, and every
worker forked from it, starts no spinning OpenBLAS threads. Only the fork server imports it
(:data:`goalkit.pipeline.workers.WARM_MODULES` puts it first on the server's preload list);
nothing in the user's process does.
"""

from goalkit.threadenv import limit_this_process

limit_this_process()
