"""Errors of threshold tuning (subclasses of :class:`goalkit.errors.GoalkitError`)."""

from __future__ import annotations

from goalkit.errors import GoalkitError


class LabelError(GoalkitError):
    """A labelled-pairs file, or the logs' own success labels, cannot be used."""


class TuningError(GoalkitError):
    """The labelled data cannot answer the question asked (e.g. no reached pairs at all)."""
