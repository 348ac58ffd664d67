"""goalkit: turn existing task logs into goal-conditioned training sets.

The flow is reader -> goal map -> relabelling strategies -> reward rule -> writer.
Everything downstream of the reader sees only an :class:`~goalkit.logs.episodes.EpisodeSet`
and a goal map, never a file format.

The public API is the names in ``goalkit.__all__``; use them as ``goalkit.NAME`` or
``from goalkit import NAME``. They are loaded on first use (PEP 562 module ``__getattr__``), so
``import goalkit`` imports neither h5py, faiss, matplotlib nor Dask. Every other module is
internal and may change.

Examples
--------
>>> import goalkit                                                      # doctest: +SKIP
>>> result = goalkit.build("gantry-recipe.toml", runner=goalkit.LocalWorkers(2))  # doctest: +SKIP
>>> goalkit.verify(result.path).ok                                      # doctest: +SKIP
True
"""

from __future__ import annotations

import importlib

__version__ = "0.1.0"

from goalkit.errors import (DatasetError, EmbeddingError, GoalkitError, LayoutError,  # noqa: E402
                            LabelError, LogError, OutputError, ParameterError, RecipeError, StrategyError,
                            TuningError)

#: Public name -> the module that defines it (imported on first use).
_LAZY = {
    # the main job
    "load_recipe": "goalkit.pipeline.recipe", "Recipe": "goalkit.pipeline.recipe",
    "build": "goalkit.apibuild", "BuildResult": "goalkit.pipeline.build",
    "InProcess": "goalkit.apibuild", "LocalWorkers": "goalkit.apibuild", "DaskCluster": "goalkit.apibuild",
    "verify": "goalkit.api", "tune": "goalkit.api", "VerifyReport": "goalkit.write.verify",
    "open_set": "goalkit.write.reader", "GoalSet": "goalkit.write.reader",
    "GoalSampler": "goalkit.write.sampler",
    "HeadSampler": "goalkit.write.headsampler", "GoalHead": "goalkit.heads",
    "NumpyBatches": "goalkit.write.adapters", "TorchBatches": "goalkit.write.adapters",
    "TorchRows": "goalkit.write.adapters", "SampledBatches": "goalkit.write.adapters",
    "TorchSampledBatches": "goalkit.write.adapters",
    "info": "goalkit.write.info", "write_card": "goalkit.write.card",
    "make_demo": "goalkit.demo.files",
    # logs
    "open_logs": "goalkit.logs.anylogs", "scan": "goalkit.api", "load_layout": "goalkit.logs.layout",
    "Layout": "goalkit.logs.layout", "propose_layout": "goalkit.logs.detect",
    "iter_chunks": "goalkit.logs.episodes", "EpisodeSet": "goalkit.logs.episodes",
    "LogSource": "goalkit.logs.episodes",
    # relabelling and reward
    "Mixture": "goalkit.relabel.mixture", "RelabelContext": "goalkit.relabel.context",
    "RewardRule": "goalkit.reward",
    # goal maps and embeddings
    "Embedding": "goalkit.goals.base", "Raw": "goalkit.goals.linear", "Standardised": "goalkit.goals.linear",
    "PCA": "goalkit.goals.linear", "SFA": "goalkit.goals.sfa", "FrameEmbedding": "goalkit.goals.frames",
    "Precomputed": "goalkit.goals.precomputed", "EmbeddingGoalMap": "goalkit.goals.embedmap",
    "load_embedding": "goalkit.goals.embedfile", "save_embedding": "goalkit.goals.embedfile",
    "fit_on_logs": "goalkit.goals.fitlogs",
    "IndexSettings": "goalkit.goals.neighbours", "build_index": "goalkit.goals.neighbours",
    # tuning
    "TuneResult": "goalkit.thresholds.session", "ThresholdTuner": "goalkit.thresholds.tuner",
    "load_labelled_pairs": "goalkit.thresholds.labels", "plot_labelled": "goalkit.thresholds.plots",
    "write_tuned_recipe": "goalkit.thresholds.recipe_edit",
    # held-out suites and offline assessment
    "make_suite": "goalkit.api", "read_suite": "goalkit.suites.fileformat", "assess": "goalkit.api",
}

_ERRORS = ["GoalkitError", "LogError", "LayoutError", "RecipeError", "DatasetError", "EmbeddingError",
           "OutputError", "ParameterError", "StrategyError", "LabelError", "TuningError"]

__all__ = sorted([*_LAZY, *_ERRORS, "__version__"])


def __getattr__(name: str):
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module 'goalkit' has no attribute {name!r}")
    value = getattr(importlib.import_module(module), name)
    globals()[name] = value  # later look-ups skip __getattr__
    return value


def __dir__() -> list[str]:
    return sorted(set(__all__) | {k for k in globals() if not k.startswith("_")} | {"__version__"})
