"""Reader for robot recordings (layout shape ``"bag"``): ROS 1 bags and ROS 2 bags in SQLite
or MCAP storage, read through ``rosbags`` (no ROS installation needed).

Times are the bag's record times in int64 nanoseconds. Opening takes every bag's message
times from its indexes (:mod:`goalkit.logs.bagindex`; with ``clock = "header"`` it reads the
messages once without decoding them; marker messages are decoded), cuts episodes and computes
each episode's step times; :meth:`BagSource.read` decodes the messages of the requested
episodes (all at once when the layout is fixed, :mod:`goalkit.logs.bagfast`; otherwise one
``deserialize`` per message, then attribute look-ups) and aligns each topic to the steps with
:mod:`goalkit.logs.align`. Memory: the message times of the open bag while opening, then one
episode's decoded values.

Steps of an episode: the messages of ``step_topic``, or every ``step_period`` seconds, from the
time every topic has a message (and no earlier than the episode's start) to the last message
of the topics that are interpolated (or the episode's end). ``K`` steps give ``K`` states and
``T = K - 1`` transitions: the action of transition ``t`` is aligned at step ``t``, its reward
and success flag at step ``t + 1`` (the outcome of the action).
"""

from __future__ import annotations

import gc
import operator
import os
import threading
from array import array
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from goalkit.config import closest, load_toml
from goalkit.errors import GoalkitError, LayoutError, LogError
from goalkit.logs import align as al
from goalkit.logs import bagros1
from goalkit.logs.bagdecode import decode_all
from goalkit.logs.bagfast import fixed_layout_values
from goalkit.logs.bagimage import decode_image
from goalkit.logs.bagindex import record_times, window_reader
from goalkit.logs.naming import natural_sorted
from goalkit.logs.recordspec import split_ref
from goalkit.logs.source import BaseSource

#: A value in [keys] that is read from the sidecar file instead of a topic.
SIDECAR = "@sidecar"
#: Image message types read as camera frames.
IMAGE_TYPES = ("sensor_msgs/msg/Image", "sensor_msgs/msg/CompressedImage")


def _rosbags():
    try:
        from rosbags.highlevel import AnyReader
        from rosbags.typesys import Stores, get_typestore
    except ImportError:  # pragma: no cover - the extra is installed in tests
        raise LogError("reading bags needs rosbags: pip install 'goalkit[bags]'") from None
    return AnyReader, get_typestore(Stores.LATEST)


def is_bag_path(path) -> bool:
    """True for a ROS 1 ``.bag`` file, a ROS 2 bag directory, or a folder holding such bags."""
    p = Path(path)
    if p.is_file():
        return p.suffix == ".bag" or (p.suffix in (".mcap", ".db3") and (p.parent / "metadata.yaml").exists())
    if p.is_dir():
        return (p / "metadata.yaml").exists() or any(
            (c.suffix == ".bag" and c.is_file()) or (c / "metadata.yaml").exists() for c in p.iterdir())
    return False


def find_bags(path) -> list[Path]:
    """The bags at ``path``: one bag, or the bags directly inside a folder in natural order."""
    p = Path(path)
    if not p.exists():
        raise LogError("file not found", file=p)
    if p.is_file():
        if p.suffix == ".bag":
            return [p]
        if (p.parent / "metadata.yaml").exists():
            return [p.parent]
        raise LogError("expected a ROS 1 .bag file, a ROS 2 bag directory (with metadata.yaml) "
                       "or a folder of bags", file=p)
    if (p / "metadata.yaml").exists():
        return [p]
    names = [c.name for c in p.iterdir()
             if (c.suffix == ".bag" and c.is_file()) or (c / "metadata.yaml").exists()]
    if not names:
        raise LogError("no bags found: expected .bag files or ROS 2 bag directories (with "
                       "metadata.yaml)", file=p)
    return [p / n for n in natural_sorted(names)]


def bag_files(bag: Path) -> list[str]:
    """Every file of a bag (a ROS 2 bag directory's metadata and storage files)."""
    if bag.is_file():
        return [str(bag)]
    return [str(bag / n) for n in sorted(os.listdir(bag)) if (bag / n).is_file()]


def open_reader(bag: Path):
    """An opened reader of one bag (close it after use): for a ROS 1 bag goalkit's own index
    reader (:mod:`goalkit.logs.bagros1`, memory bounded by a chunk), else a rosbags
    ``AnyReader``."""
    AnyReader, store = _rosbags()
    if bagros1.ENABLED and Path(bag).is_file() and Path(bag).suffix == ".bag":
        try:
            return bagros1.open_bag(bag, store)
        except GoalkitError:
            raise
        except Exception as exc:  # an unreadable file or a definition rosbags refuses
            raise LogError(f"cannot read as a bag ({type(exc).__name__}: {exc})", file=bag) from None
    try:
        reader = AnyReader([bag], default_typestore=store)
        reader.open()
    except Exception as exc:  # rosbags raises several unrelated types on damaged bags
        raise LogError(f"cannot read as a bag ({type(exc).__name__}: {exc})", file=bag) from None
    return reader


def header_reader(reader, conn):
    """A function reading the header stamp (ns) of a raw message without decoding it, or None
    when the message type does not start with a std_msgs/Header.

    CDR (ROS 2): 4-byte encapsulation header (byte 1 odd = little endian), then int32 sec and
    uint32 nanosec (OMG DDS-XTypes CDR; builtin_interfaces/Time). ROS 1: uint32 seq, then
    uint32 sec and uint32 nsec (ROS 1 serialization of std_msgs/Header).
    """
    import struct

    fields = reader.typestore.fielddefs.get(conn.msgtype, ((), ()))[1]
    if not fields or fields[0][0] != "header" or fields[0][1][1] != "std_msgs/msg/Header":
        return None
    if reader.is2:
        le, be = struct.Struct("<iI").unpack_from, struct.Struct(">iI").unpack_from
        def read(raw):
            sec, nsec = (le if raw[1] & 1 else be)(raw, 4)
            return sec * 1_000_000_000 + nsec
    else:
        unpack = struct.Struct("<II").unpack_from
        def read(raw):
            sec, nsec = unpack(raw, 4)
            return sec * 1_000_000_000 + nsec
    return read


def _seconds(t, t0) -> str:
    return f"t = {(int(t) - int(t0)) / 1e9:.3f} s into the bag"


def _fields_of(obj) -> list[str]:
    return [f for f in getattr(obj, "__dataclass_fields__", {}) if f != "__msgtype__"]


@dataclass
class Ref:
    """A role's source: a topic and a field path in its messages."""

    role: str                # "action", "field joints", ...
    text: str                # as written in the layout
    topic: str
    path: str
    getter: object = None    # operator.attrgetter for the value
    width: int = 0
    kind: str = "f"          # numpy kind of the value: "f", "i", "u", "b"


def resolve(ref: Ref, msg, msgtype: str, file) -> None:
    """Find how to read ``ref.path`` from a message; set getter, width and kind."""
    obj, walked = msg, []
    for part in [p for p in ref.path.split(".") if p]:
        names = _fields_of(obj)
        if part not in names:
            where = msgtype if not walked else f"{msgtype} {'.'.join(walked)}"
            near = closest(part, names)
            raise LogError(f"no field '{part}' in {where}; fields: {', '.join(names) or 'none'}"
                           + (f" (closest: {near})" if near else ""), file=file, key=ref.text)
        obj = getattr(obj, part)
        walked.append(part)
    path = ".".join(walked)
    if isinstance(obj, np.ndarray) and obj.ndim == 1 and obj.dtype.kind in "iufb":
        ref.getter, ref.width, ref.kind = operator.attrgetter(path), int(obj.shape[0]), obj.dtype.kind
        return
    if isinstance(obj, (bool, int, float, np.number, np.bool_)) and path:
        ref.getter, ref.width = operator.attrgetter(path), 1
        ref.kind = np.asarray(obj).dtype.kind
        return
    subs = _fields_of(obj)
    vals = [getattr(obj, s) for s in subs]
    if subs and all(isinstance(v, (int, float, np.number)) and not isinstance(v, bool) for v in vals):
        ref.getter = operator.attrgetter(*[f"{path}.{s}" if path else s for s in subs])
        ref.width = len(subs)
        ref.kind = "f" if any(isinstance(v, (float, np.floating)) for v in vals) else "i"
        return
    what = type(obj).__name__ if not subs else f"a message with fields {', '.join(subs)}"
    raise LogError(f"field '{ref.path}' of {msgtype} is {what}; expected a number, a numeric array "
                   f"or a message of numbers (such as a point's x, y, z)", file=file, key=ref.text)


class BagSource(BaseSource):
    """ROS bags. Use :func:`goalkit.logs.open_logs` to make one."""

    def __init__(self, path, layout, skip_bad_episodes=False, advance=None):
        super().__init__(path, layout, skip_bad_episodes, advance)
        self.spec = spec = layout.record
        self.bags = find_bags(self.path)
        self.files = [f for b in self.bags for f in bag_files(b)]
        k = layout.keys
        if k.next_observation is not None:
            raise LayoutError("[keys] next_observation is not read from bags (states are aligned "
                              "at every step)", key="keys.next_observation")
        self.refs: list[Ref] = []
        for name, text in layout.fields or [("observation", k.observation)]:
            role = "observation" if not layout.fields else f"field {name}"
            self.refs.append(Ref(role, text, *split_ref(text)))
        self.obs_refs = list(self.refs)
        self.role_refs = {}
        for role in ("action", "reward", "success", "task", "task_goal"):
            text = getattr(k, role)
            if text is not None and text != SIDECAR:
                self.role_refs[role] = Ref(role, text, *split_ref(text))
                self.refs.append(self.role_refs[role])
        self.frame_topic = k.frame
        self.sidecar = None
        if SIDECAR in (k.task, k.success, k.reward):
            self.sidecar = self._load_sidecar()
        if "action" not in self.role_refs:
            raise LayoutError("expected [keys] action = \"TOPIC:FIELD\"", key="keys.action")
        self.topics = sorted({r.topic for r in self.refs} | ({self.frame_topic} if self.frame_topic else set())
                             | ({spec.step_topic} if spec.step_topic else set()))
        # per episode: bag index, step times, bag start, window begin and end (episode clock),
        # first and last record time of its messages (what a read asks rosbags for)
        self.windows = []
        problems, lengths = [], []
        for b, bag in enumerate(self.bags):
            self._plan_bag(b, bag, problems, lengths)
        if self.sidecar is not None and len(self.sidecar) != len(lengths):
            raise LogError(f"has {len(self.sidecar)} [[episode]] entries; the bags hold "
                           f"{len(lengths)} episodes", file=self._sidecar_path, key="episode")
        self.obs_width = sum(r.width for r in self.obs_refs)
        self.action_width = self.role_refs["action"].width
        if layout.fields:
            edges = np.concatenate([[0], np.cumsum([r.width for r in self.obs_refs])])
            self.fields = {n: (int(edges[i]), int(edges[i + 1])) for i, (n, _) in enumerate(layout.fields)}
        self._settle(lengths, problems)

    # ---- open ------------------------------------------------------------------------------
    def _load_sidecar(self):
        spec = self.spec
        if spec.sidecar is None:
            raise LayoutError(f"a key is \"{SIDECAR}\" but [bag] has no sidecar file", key="bag.sidecar")
        base = Path(self.path) if Path(self.path).is_dir() else Path(self.path).parent
        p = Path(spec.sidecar) if os.path.isabs(spec.sidecar) else base / spec.sidecar
        self._sidecar_path = str(p)
        doc = load_toml(p, LogError)
        eps = doc.get("episode")
        if not isinstance(eps, list) or not all(isinstance(e, dict) for e in eps):
            raise LogError("expected [[episode]] tables, one per episode in order", file=p, key="episode")
        self.files.append(str(p))
        return eps

    def _sidecar_value(self, e, name, kind):
        v = self.sidecar[e].get(name)
        ok = isinstance(v, bool) if kind is bool else (isinstance(v, (int, float)) and not isinstance(v, bool)
                                                        and (kind is float or float(v).is_integer()))
        if not ok:
            raise LogError(f"expected {name} = a {kind.__name__}, got {v!r}", file=self._sidecar_path,
                           key=f"episode[{e}].{name}", episode=e)
        return v

    def _plan_bag(self, b, bag, problems, lengths):
        reader = open_reader(bag)
        try:
            self._scan_bag(b, bag, reader, problems, lengths)
        except GoalkitError:
            reader.close()
            raise
        except bagros1.BadBag as exc:
            reader.close()
            raise bagros1.as_log_error(exc, bag) from None
        except Exception as exc:   # a damaged storage file surfaces as many exception types
            reader.close()
            raise LogError(f"cannot read the bag's messages ({type(exc).__name__}: {exc})", file=bag) from None
        self._keep(b, reader)

    # An opened bag is kept for the next read: opening costs a pass over the bag in rosbags
    # (a ROS 1 bag's chunk and index records walked, a SQLite bag's messages counted), and reads come
    # in chunks of episodes, mostly from the same bag. One bag is kept; a read from another
    # thread while it is in use opens its own. Not pickled (workers open their own).
    def _keep(self, b, reader, windows=None):
        old = getattr(self, "_kept", None)
        self._kept = (b, reader, windows)
        if old is not None and old[1] is not reader:
            old[1].close()

    def close(self):
        """Close the bag kept open between reads (reopened when needed)."""
        old, self._kept = getattr(self, "_kept", None), None
        if old is not None:
            old[1].close()

    def __getstate__(self):
        state = dict(self.__dict__)
        state["_kept"] = None
        state.pop("_kept_lock", None)
        return state

    def _scan_bag(self, b, bag, reader, problems, lengths):
        spec = self.spec
        topics = reader.topics
        need = list(self.topics) + ([spec.marker_topic] if spec.marker_topic else [])
        for t in need:
            if t not in topics:
                near = closest(t, list(topics))
                raise LogError(f"no such topic; topics: {', '.join(sorted(topics)) or 'none'}"
                               + (f" (closest: {near})" if near else ""), file=bag, key=t)
        conns = [c for c in reader.connections if c.topic in self.topics]
        types = {c.topic: c.msgtype for c in conns}
        if b == 0:
            self._types = types
        for t, ty in types.items():
            if ty != self._types.get(t, ty):
                raise LogError(f"carries {ty}; the first bag's carries {self._types[t]}; expected "
                               f"one message type per topic", file=bag, key=t)
        cid = {c.id: c.topic for c in conns}
        stamps = {t: array("q") for t in self.topics}     # 8 bytes per message
        indexed = record_times(reader, self.topics) if spec.clock != "header" else None
        if indexed is not None:
            pass                                       # from the bag's indexes, no record read
        elif spec.clock == "header":
            rec = {t: array("q") for t in self.topics}
            heads = {c.id: header_reader(reader, c) for c in conns}
            for conn, t, raw in reader.messages(connections=conns):   # no decoding
                rec[cid[conn.id]].append(t)
                h = heads[conn.id]
                stamps[cid[conn.id]].append(t if h is None else h(raw))
            rec = {t: np.frombuffer(v, dtype=np.int64) if len(v) else np.zeros(0, np.int64)
                   for t, v in rec.items()}
        else:
            for conn, t, _ in reader.messages(connections=conns):   # times only, no decoding
                stamps[cid[conn.id]].append(t)
        times = indexed if indexed is not None else {
            t: np.frombuffer(v, dtype=np.int64) if len(v) else np.zeros(0, np.int64) for t, v in stamps.items()}
        if spec.clock != "header":
            rec = times
        if b == 0:
            self._probe(reader, bag)
        marker = None
        if spec.marker_topic is not None:
            marker = self._markers(reader, bag)
        t0 = reader.start_time
        for topic, t in times.items():
            back = np.flatnonzero(t[1:] < t[:-1])          # 1 byte a message, not 8
            if back.size:
                raise LogError(f"time goes backwards at {_seconds(t[back[0] + 1], t0)} (the message "
                               f"before is at {_seconds(t[back[0]], t0)}); expected times that never "
                               f"decrease along a topic", file=bag, key=topic)
        for begin, end in self._cut(times, marker, t0):
            e = len(lengths)
            try:
                steps = self._steps(times, begin, end, bag, e, t0)
            except LogError as exc:
                problems.append((e, exc))
                steps = np.zeros(0, dtype=np.int64)
            lo = min(int(r[np.searchsorted(t, begin, "left"):np.searchsorted(t, end, "right")].min(initial=end))
                     for t, r in zip(times.values(), rec.values()))
            hi = max(int(r[np.searchsorted(t, begin, "left"):np.searchsorted(t, end, "right")].max(initial=begin))
                     for t, r in zip(times.values(), rec.values()))
            self.windows.append((b, steps, t0, begin, end, lo, hi))
            lengths.append(max(steps.shape[0] - 1, 0))

    def _probe(self, reader, bag):
        """Decode the first message of each topic of the first bag: resolve every field path."""
        firsts = {}
        for conn in reader.connections:
            if conn.topic in self.topics and conn.topic not in firsts:
                for c, t, raw in reader.messages(connections=[conn]):
                    firsts[conn.topic] = (self._decode(reader, raw, c, bag, None, t, reader.start_time), c.msgtype)
                    break
        for ref in self.refs:
            if ref.topic not in firsts:
                raise LogError("no message on this topic in the first bag", file=bag, key=ref.topic)
            msg, msgtype = firsts[ref.topic]
            if msgtype in IMAGE_TYPES:
                raise LayoutError(f"{ref.topic} carries images ({msgtype}); map it as [keys] frame",
                                  key=ref.text)
            resolve(ref, msg, msgtype, bag)
            rule = self.spec.rule(ref.topic)
            if rule == "interpolate" and ref.kind != "f":
                raise LayoutError(f"{ref.text} holds {'flags' if ref.kind == 'b' else 'integers'}; "
                                  f"expected latest or nearest (interpolate is for continuous "
                                  f"signals)", key=f"bag.align.{ref.topic}")
        if self.frame_topic is not None:
            msgtype = firsts[self.frame_topic][1]
            if msgtype not in IMAGE_TYPES:
                raise LogError(f"has messages of type {msgtype}; expected {' or '.join(IMAGE_TYPES)}",
                               file=bag, key=self.frame_topic)
            if self.spec.rule(self.frame_topic) == "interpolate":
                raise LayoutError("images are not interpolated; expected latest or nearest",
                                  key=f"bag.align.{self.frame_topic}")

    def _decode(self, reader, raw, conn, bag, episode, t, t0):
        try:
            return reader.deserialize(raw, conn.msgtype)
        except Exception as exc:
            raise LogError(f"cannot decode a {conn.msgtype} message at {_seconds(t, t0)} "
                           f"({type(exc).__name__}: {exc})", file=bag, key=conn.topic, episode=episode) from None

    def _markers(self, reader, bag):
        spec = self.spec
        conns = [c for c in reader.connections if c.topic == spec.marker_topic]
        ts, vals = [], []
        for c, t, raw in reader.messages(connections=conns):
            m = self._decode(reader, raw, c, bag, None, t, reader.start_time)
            ts.append(t)
            vals.append(bool(getattr(m, "data", True)) if spec.episodes == "marker" else True)
            if spec.episodes == "marker" and not isinstance(getattr(m, "data", None), (bool, np.bool_)):
                raise LogError(f"has {c.msgtype} messages; expected std_msgs/msg/Bool (true while "
                               f"recording)", file=bag, key=spec.marker_topic)
        return np.asarray(ts, dtype=np.int64), np.asarray(vals, dtype=bool)

    def _cut(self, times, marker, t0):
        """Episode windows ``(begin, end)`` (inclusive ns) of one bag."""
        spec = self.spec
        held = [t for t in times.values() if t.size]     # each sorted (checked before)
        if not held:
            return []
        first, last = min(int(t[0]) for t in held), max(int(t[-1]) for t in held)
        if spec.episodes == "per-bag":
            return [(first, last)]
        if spec.episodes == "gap":
            # all topics merged only when no step topic is named (another 8 bytes a message)
            ref = times[spec.step_topic] if spec.step_topic else np.sort(np.concatenate(held))
            cuts = np.flatnonzero(np.diff(ref) > int(round(spec.cut_gap * 1e9))) + 1
            starts = np.concatenate([[0], cuts])
            stops = np.concatenate([cuts, [ref.size]]) - 1
            return [(int(ref[a]), int(ref[z])) for a, z in zip(starts, stops)]
        mt, mv = marker
        if spec.episodes == "start":
            ends = np.concatenate([mt[1:] - 1, [last]])
            return [(int(a), int(z)) for a, z in zip(mt, ends)]
        prev = np.concatenate([[False], mv[:-1]])
        starts = np.flatnonzero(mv & ~prev)
        out = []
        for s in starts.tolist():               # one entry per episode
            off = np.flatnonzero(~mv[s:])
            end = int(mt[s + off[0]]) - 1 if off.size else last
            out.append((int(mt[s]), end))
        return out

    def _steps(self, times, begin, end, bag, e, t0):
        spec = self.spec
        inside = {}
        for topic, t in times.items():
            w = t[np.searchsorted(t, begin, "left"):np.searchsorted(t, end, "right")]
            if w.size == 0:
                raise LogError(f"no message on this topic in the episode ({_seconds(begin, t0)} to "
                               f"{_seconds(end, t0)})", file=bag, key=topic, episode=e)
            inside[topic] = w
        start = max(int(w[0]) for w in inside.values())
        interp = [tp for tp in inside if spec.rule(tp) == "interpolate"]
        stop = min(int(inside[tp][-1]) for tp in interp) if interp else end
        if spec.step_topic is not None:
            st = inside[spec.step_topic]
            st = st[(st >= start) & (st <= stop)]
        else:
            period = int(round(spec.step_period * 1e9))
            n = (stop - start) // period + 1 if stop >= start else 0
            st = start + np.arange(n, dtype=np.int64) * period
        if spec.max_gap is not None and st.size:
            limit = int(round(spec.max_gap * 1e9))
            for topic, w in inside.items():
                w = w[(w >= st[0]) & (w <= st[-1])]
                big = np.flatnonzero(np.diff(w) > limit)
                if big.size:
                    g = big[0]
                    raise LogError(f"gap of {(w[g + 1] - w[g]) / 1e9:.3f} s after {_seconds(w[g], t0)}; "
                                   f"expected at most max_gap = {spec.max_gap} s", file=bag, key=topic,
                                   episode=e)
        if st.shape[0] < 2:
            raise LogError(f"has {st.shape[0]} step(s) where every topic has messages ("
                           f"{_seconds(start, t0)} to {_seconds(stop, t0)}); expected at least 2",
                           file=bag, key=spec.step_topic or "bag.step_period", episode=e)
        return st.astype(np.int64)

    # ---- read ------------------------------------------------------------------------------
    def _file_of(self, episode):
        return str(self.bags[self.windows[episode][0]])

    def _read_episodes(self, ids):
        parts = []
        ids = ids.tolist()
        i = 0
        while i < len(ids):                  # episodes of one bag share an opened reader
            b = self.windows[ids[i]][0]
            j = i
            while j < len(ids) and self.windows[ids[j]][0] == b:
                j += 1
            lock = self.__dict__.setdefault("_kept_lock", threading.Lock())
            if lock.acquire(blocking=False):           # the kept bag, or this one kept next
                try:
                    kept = getattr(self, "_kept", None)
                    if kept is None or kept[0] != b:
                        self._keep(b, open_reader(self.bags[b]))
                        kept = self._kept
                    _, reader, windows = kept
                    if windows is None:
                        windows = window_reader(reader, self.topics)
                        self._kept = (b, reader, windows)
                    parts += [self._read_one(reader, e, windows) for e in ids[i:j]]
                finally:
                    lock.release()
            else:                                      # another thread reads the kept bag
                reader = open_reader(self.bags[b])
                try:
                    windows = window_reader(reader, self.topics)
                    parts += [self._read_one(reader, e, windows) for e in ids[i:j]]
                finally:
                    reader.close()
            i = j
        cols = {name: np.concatenate([p[name] for p in parts]) for name in parts[0]}
        return cols

    def _read_one(self, reader, e, windows=None):
        b, st, t0, begin, end, lo, hi = self.windows[e]
        header = self.spec.clock == "header"
        bag = self.bags[b]
        k = self.layout.keys
        conns = [c for c in reader.connections if c.topic in self.topics]
        topic_of = {c.id: c.topic for c in conns}
        type_of = {c.topic: c for c in conns}
        raws = {topic: [] for topic in self.topics}
        recs = {topic: [] for topic in self.topics}
        # every message of the episode's window (the latest one before the first step included)
        try:
            if windows is not None:                   # sliced out of chunks via the indexes
                for topic, (t, r) in windows.window(lo, hi).items():
                    recs[topic], raws[topic] = t, r
            else:
                for conn, t, raw in reader.messages(connections=conns, start=lo, stop=hi + 1):
                    topic = topic_of[conn.id]
                    recs[topic].append(t)
                    raws[topic].append(raw)
        except bagros1.BadBag as exc:
            raise bagros1.as_log_error(exc, bag, episode=e) from None
        except Exception as exc:   # a damaged storage file surfaces as many exception types
            raise LogError(f"cannot read the bag's messages ({type(exc).__name__}: {exc})", file=bag,
                           episode=e) from None
        deser = reader.typestore.deserialize_cdr if reader.is2 else reader.typestore.deserialize_ros1
        frame = self.frame_topic
        aligned, images = {}, None
        for topic in self.topics:
            conn, raw_list = type_of[topic], raws[topic]
            t = np.asarray(recs[topic], dtype=np.int64)
            read_stamp = header_reader(reader, conn)
            if self.spec.clock == "header" and read_stamp is not None:
                t = np.fromiter(map(read_stamp, raw_list), dtype=np.int64, count=len(raw_list))
                keep = (t >= begin) & (t <= end)
                t = t[keep]
                raw_list = [r for r, kp in zip(raw_list, keep.tolist()) if kp]
            refs = [r for r in self.refs if r.topic == topic]
            if not refs and topic != frame:
                continue                               # the step topic: times only
            if not raw_list:
                raise LogError("no message on this topic in the episode", file=bag, key=topic, episode=e)

            def decode(i, raw):
                try:
                    return deser(raw, conn.msgtype)
                except Exception:
                    self._decode(reader, raw, conn, bag, e, int(t[i]), t0)   # raises one line

            fast = None
            if topic != frame:
                fast = fixed_layout_values(raw_list, decode(0, raw_list[0]), refs, reader.typestore,
                                           ros1=not reader.is2, header=read_stamp is not None,
                                           decode=lambda i: decode(i, raw_list[i]))
            if fast is not None:
                for ref in refs:
                    if fast[ref.text].shape[1] != ref.width:
                        raise LogError(f"has values of width {fast[ref.text].shape[1]}; expected "
                                       f"{ref.width} in every message", file=bag, key=ref.text, episode=e)
                    aligned[ref.text] = (t, fast[ref.text])
                continue
            picked = None
            if topic != frame:                         # keep the values, not the messages
                getters = [r.getter for r in refs]
                pick = getters[0] if len(getters) == 1 else (lambda m: tuple(g(m) for g in getters))
                picked = decode_all(raw_list, reader.typestore, conn.msgtype, ros1=not reader.is2,
                                    pick=pick)
                msgs = None
            if picked is None:
                msgs = decode_all(raw_list, reader.typestore, conn.msgtype, ros1=not reader.is2)
            if picked is None and msgs is None:        # one by one: the failing one is named
                collect = gc.isenabled()
                gc.disable()
                try:
                    msgs = [decode(i, raw) for i, raw in enumerate(raw_list)]
                finally:
                    if collect:
                        gc.enable()
            if topic == frame:
                images = (t, msgs)
            for slot, ref in enumerate(refs):
                if picked is None:
                    out = [ref.getter(m) for m in msgs]
                else:
                    out = picked if len(refs) == 1 else [v[slot] for v in picked]
                try:
                    v = np.asarray(out, dtype=np.float64 if ref.kind == "f" else None).reshape(len(out), -1)
                except ValueError:
                    v = None
                if v is None or v.shape[1] != ref.width:
                    widths = sorted({int(np.size(x)) for x in out})
                    raise LogError(f"has values of widths {widths}; expected {ref.width} in every "
                                   f"message", file=bag, key=ref.text, episode=e)
                aligned[ref.text] = (t, v)
        rule = self.spec.rule

        def at(ref, when):
            t, v = aligned[ref.text]
            return al.align(rule(ref.topic), t, v, when)

        out = {"observations": np.concatenate([at(r, st).astype(np.float64) for r in self.obs_refs], axis=1),
               "actions": at(self.role_refs["action"], st[:-1]).astype(np.float64)}
        T = st.shape[0] - 1
        if k.reward is not None:
            if k.reward == SIDECAR:
                r = np.zeros(T)
                r[-1] = self._sidecar_value(e, "reward", float)
            else:
                r = at(self.role_refs["reward"], st[1:])[:, 0].astype(np.float64)
            out["rewards"] = r
        if k.success is not None:
            if k.success == SIDECAR:
                s = np.zeros(T, dtype=bool)
                s[-1] = self._sidecar_value(e, "success", bool)
            else:
                s = at(self.role_refs["success"], st[1:])[:, 0] != 0
            out["success"] = s
        if k.task is not None:
            task = (self._sidecar_value(e, "task", int) if k.task == SIDECAR
                    else at(self.role_refs["task"], st[:1])[0, 0])
            out["task_ids"] = np.asarray([int(task)], dtype=np.int64)
        if k.task_goal is not None:
            out["task_goals"] = at(self.role_refs["task_goal"], st[:-1]).astype(np.float64)
        if frame is not None:
            out["frames"] = self._frames(images, st, bag, e, t0)
        return out

    def _frames(self, slot, st, bag, e, t0):
        t, msgs = slot
        rule = self.spec.rule(self.frame_topic)
        idx = al.latest_index(t, st) if rule == "latest" else al.nearest_index(t, st)
        uniq, inv = np.unique(idx, return_inverse=True)
        size = self.spec.frame_size
        pics = [decode_image(msgs[i], size, file=bag, key=self.frame_topic, episode=e,
                             when=_seconds(t[i], t0)) for i in uniq.tolist()]
        shapes = {p.shape for p in pics}
        if len(shapes) > 1:
            raise LogError(f"images of shapes {sorted(shapes)} in one episode; expected one size "
                           f"(set [bag] frame_size)", file=bag, key=self.frame_topic, episode=e)
        return np.stack(pics)[inv]

    def key_info(self) -> list[dict]:
        """Role, topic:field, value kind and width of every mapped source."""
        out = [{"role": r.role, "key": r.text, "dtype": {"f": "float", "b": "bool"}.get(r.kind, "int"),
                "shape": [r.width]} for r in self.refs]
        if self.frame_topic:
            out.append({"role": "frame", "key": self.frame_topic, "dtype": "uint8",
                        "shape": list(self.spec.frame_size or ())})
        return out
