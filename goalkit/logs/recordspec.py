"""The ``[bag]`` and ``[table]`` sections of a layout (shapes ``"bag"`` and ``"table"``).

Shape ``"bag"``: robot recordings (ROS 1 and ROS 2 bags). Each value in ``[keys]`` and
``[fields]`` is ``"TOPIC:FIELD.PATH"`` (``"/arm/joints:position"``,
``"/arm/tip:pose.position"``); ``[keys] frame`` is an image topic alone. The ``[bag]`` table says
when the steps are (``step_topic`` or ``step_period`` in seconds), how each topic is aligned to
them (``[bag.align]``: ``"latest"``, ``"nearest"`` or ``"interpolate"``), how the recording is
cut into episodes (``episodes``), the longest gap allowed inside an episode (``max_gap``), a
sidecar file of per-episode outcomes and the frame size.

Shape ``"table"``: step tables in Parquet, one row per step, ``[table] episode_column``; a
value in ``[keys]``/``[fields]`` is a column (a number or a fixed-size list) or several scalar
columns separated by commas.

See ``docs/layout.md`` for examples.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field

from goalkit.config import check_keys
from goalkit.errors import LayoutError

#: Alignment rules of a topic to the steps.
ALIGN_RULES = ("latest", "nearest", "interpolate")
#: How a recording is cut into episodes.
EPISODE_CUTS = ("per-bag", "marker", "start", "gap")
#: Which time a message has: the bag's record time, or the stamp of its header.
CLOCKS = ("record", "header")
BAG_KEYS = ("clock", "step_topic", "step_period", "align", "episodes", "marker_topic", "cut_gap",
            "max_gap", "sidecar", "frame_size")
TABLE_KEYS = ("episode_column", "file_pattern")


@dataclass(frozen=True)
class BagSpec:
    """The parsed ``[bag]`` table (see the module docstring)."""

    step_topic: str | None = None
    step_period: float | None = None
    align: tuple = ()                  # (topic, rule) pairs; unlisted topics are "latest"
    episodes: str = "per-bag"
    marker_topic: str | None = None
    cut_gap: float | None = None
    max_gap: float | None = None
    sidecar: str | None = None
    frame_size: tuple | None = None
    clock: str = "record"

    def rule(self, topic: str) -> str:
        """The alignment rule of a topic."""
        return dict(self.align).get(topic, "latest")


@dataclass(frozen=True)
class TableSpec:
    """The parsed ``[table]`` table."""

    episode_column: str
    file_pattern: str = "*.parquet"


def split_ref(ref: str) -> tuple[str, str]:
    """Split ``"TOPIC:FIELD.PATH"`` into topic and path (path ``""`` when absent)."""
    topic, _, path = ref.partition(":")
    return topic, path


def _seconds(t, name, file, required=False):
    if name not in t:
        if required:
            raise LayoutError("missing; expected a time in seconds", file=file, key=f"bag.{name}")
        return None
    v = t[name]
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) or v <= 0:
        raise LayoutError(f"expected a positive time in seconds, got {v!r}", file=file, key=f"bag.{name}")
    return float(v)


def _text(t, name, file, section):
    v = t.get(name)
    if v is None:
        return None
    if not isinstance(v, str) or not v:
        raise LayoutError(f"expected a non-empty string, got {v!r}", file=file, key=f"{section}.{name}")
    return v


def parse_bag(t, file) -> BagSpec:
    """Check a ``[bag]`` table and return a :class:`BagSpec`.

    Raises
    ------
    LayoutError
        On unknown keys (with the closest valid one), both or neither of step_topic and
        step_period, an unknown alignment rule or episode cut, or a missing marker topic / gap.
    """
    if not isinstance(t, dict):
        raise LayoutError(f"expected a table [bag], got {t!r}", file=file, key="bag")
    check_keys(t, BAG_KEYS, file=file, section="[bag]", error=LayoutError)
    step_topic = _text(t, "step_topic", file, "bag")
    step_period = _seconds(t, "step_period", file)
    if (step_topic is None) == (step_period is None):
        raise LayoutError("expected exactly one of step_topic (a topic whose messages are the "
                          "steps) and step_period (seconds)", file=file, key="bag")
    align_t = t.get("align", {})
    if not isinstance(align_t, dict):
        raise LayoutError(f"expected a table [bag.align], got {align_t!r}", file=file, key="bag.align")
    for topic, rule in align_t.items():
        if rule not in ALIGN_RULES:
            raise LayoutError(f"expected one of {', '.join(ALIGN_RULES)}, got {rule!r}", file=file,
                              key=f"bag.align.{topic}")
    cut = t.get("episodes", "per-bag")
    if cut not in EPISODE_CUTS:
        raise LayoutError(f"expected one of {', '.join(EPISODE_CUTS)}, got {cut!r}", file=file,
                          key="bag.episodes")
    marker = _text(t, "marker_topic", file, "bag")
    if cut in ("marker", "start") and marker is None:
        raise LayoutError(f"episodes = \"{cut}\" needs marker_topic", file=file, key="bag.marker_topic")
    cut_gap = _seconds(t, "cut_gap", file, required=cut == "gap")
    size = t.get("frame_size")
    if size is not None:
        if (not isinstance(size, list) or len(size) != 2
                or not all(isinstance(s, int) and not isinstance(s, bool) and s > 0 for s in size)):
            raise LayoutError(f"expected [height, width] in pixels, got {size!r}", file=file,
                              key="bag.frame_size")
        size = (int(size[0]), int(size[1]))
    clock = t.get("clock", "record")
    if clock not in CLOCKS:
        raise LayoutError(f"expected one of {', '.join(CLOCKS)}, got {clock!r}", file=file, key="bag.clock")
    return BagSpec(clock=clock, step_topic=step_topic, step_period=step_period,
                   align=tuple((str(k), str(v)) for k, v in align_t.items()), episodes=cut,
                   marker_topic=marker, cut_gap=cut_gap, max_gap=_seconds(t, "max_gap", file),
                   sidecar=_text(t, "sidecar", file, "bag"), frame_size=size)


def parse_table(t, file) -> TableSpec:
    """Check a ``[table]`` table and return a :class:`TableSpec`."""
    if not isinstance(t, dict):
        raise LayoutError(f"expected a table [table], got {t!r}", file=file, key="table")
    check_keys(t, TABLE_KEYS, file=file, section="[table]", error=LayoutError)
    col = _text(t, "episode_column", file, "table")
    if col is None:
        raise LayoutError("missing; expected the name of the episode id column", file=file,
                          key="table.episode_column")
    pattern = _text(t, "file_pattern", file, "table") or "*.parquet"
    return TableSpec(episode_column=col, file_pattern=pattern)


def _q(s) -> str:
    return json.dumps(s, ensure_ascii=False)


def spec_to_toml(spec) -> list[str]:
    """TOML lines of a :class:`BagSpec` or :class:`TableSpec` (read back equal)."""
    if isinstance(spec, TableSpec):
        return ["", "[table]", f"episode_column = {_q(spec.episode_column)}",
                f"file_pattern = {_q(spec.file_pattern)}"]
    lines = ["", "[bag]"]
    if spec.step_topic is not None:
        lines.append(f"step_topic = {_q(spec.step_topic)}")
    else:
        lines.append(f"step_period = {spec.step_period!r}")
    lines.append(f"episodes = {_q(spec.episodes)}")
    if spec.clock != "record":
        lines.append(f"clock = {_q(spec.clock)}")
    if spec.marker_topic is not None:
        lines.append(f"marker_topic = {_q(spec.marker_topic)}")
    for name in ("cut_gap", "max_gap"):
        if getattr(spec, name) is not None:
            lines.append(f"{name} = {getattr(spec, name)!r}")
    if spec.sidecar is not None:
        lines.append(f"sidecar = {_q(spec.sidecar)}")
    if spec.frame_size is not None:
        lines.append(f"frame_size = [{spec.frame_size[0]}, {spec.frame_size[1]}]")
    if spec.align:
        lines += ["", "[bag.align]"] + [f"{_q(k)} = {_q(v)}" for k, v in spec.align]
    return lines
