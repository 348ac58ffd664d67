"""A seeded generator of malformed task logs, in every supported shape, for the hostile-input tests.

Each case writes one log (grouped HDF5, flat HDF5, flat .npz, or a directory of per-episode
.npz files) into its own folder, plus a layout file, and says what must happen:

* ``"refuse"``: every command exits 2 with one line on stderr that names ``file`` and every
  string of ``needles`` (the key, usually);
* ``"accept"``: every command succeeds;
* ``"any"``: random damage that may or may not matter (bytes overwritten somewhere): exit 0,
  or exit 2 with one line naming the file; never a traceback, another status or a hang.

:func:`default_cases` is the fast named set; :func:`full_cases` adds seeded random damage and
grids of declared shapes and task ids (``GOALKIT_FULL_CORPUS=1``). The logs are tiny invented
gantry episodes from :mod:`logs_testdata`.
"""

from __future__ import annotations

import io
import os
import zipfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import h5py
import numpy as np

from goalkit.logs.layout import Keys, Layout, layout_to_toml, parse_layout
from logs_testdata import make_episodes, write_flat, write_grouped, write_per_file

LENGTHS = [3, 4, 2, 5]
STATES = sum(LENGTHS) + len(LENGTHS)     # 18 observation rows, 14 action rows


@dataclass
class Made:
    """What a case wrote."""

    log: Path                     # the path given to the commands
    layout: Path
    expect: str = "refuse"        # "refuse", "accept" or "any"
    needles: list = field(default_factory=list)
    file: str | None = None       # name that must appear (default: the log's name)
    inputs: list = field(default_factory=list)   # paths to hash before/after (default: the log)


@dataclass(frozen=True)
class Case:
    name: str
    fmt: str                      # grouped, flat-h5, flat-npz, per-file, embed
    make: Callable[[Path], Made]
    subprocess_only: bool = False  # may block if opened (FIFO, device): run with a timeout


# ---- writing helpers -------------------------------------------------------------------------
def _layout(d: Path, table) -> Path:
    lay = table if isinstance(table, Layout) else parse_layout(table)
    path = d / "layout.toml"
    path.write_text(layout_to_toml(lay))
    return path


def overwrite(path: Path, offset: int, data: bytes) -> None:
    """Write ``data`` over the file's bytes at ``offset`` (the size does not change)."""
    with open(path, "r+b") as fh:
        fh.seek(offset)
        fh.write(data)


def noise(rng, n: int, old: bytes | None = None) -> bytes:
    """``n`` random bytes, each different from ``old``'s byte at the same place."""
    out = bytearray(rng.integers(0, 256, size=n, dtype=np.uint8).tobytes())
    if old is not None:
        for i in range(min(n, len(old))):
            if out[i] == old[i]:
                out[i] ^= 0xFF
    return bytes(out)


def _damage(path: Path, offset: int, n: int, rng) -> None:
    with open(path, "rb") as fh:
        fh.seek(offset)
        old = fh.read(n)
    overwrite(path, offset, noise(rng, n, old))


def grouped_log(d: Path, seed=0, edit=None, gzip=False, **kw) -> tuple[Path, dict]:
    eps = make_episodes(LENGTHS, seed=seed)
    path = d / "g.h5"
    table = write_grouped(path, eps, **kw)
    if gzip or edit is not None:
        with h5py.File(path, "a") as f:
            if gzip:
                for g in f["runs"].values():
                    for k in list(g.keys()):
                        data = g[k][()]
                        del g[k]
                        g.create_dataset(k, data=data, compression="gzip", shuffle=True,
                                         chunks=True if np.ndim(data) else None)
            if edit is not None:
                edit(f)
    return path, table


def flat_log(d: Path, seed=0, fmt="h5", edit=None, gzip=False, **kw) -> tuple[Path, dict]:
    eps = make_episodes(LENGTHS, seed=seed)
    path = d / ("f.h5" if fmt == "h5" else "f.npz")
    table = write_flat(path, eps, fmt=fmt, **kw)
    if fmt == "h5" and (gzip or edit is not None):
        with h5py.File(path, "a") as f:
            if gzip:
                for k in list(f.keys()):
                    data = f[k][()]
                    del f[k]
                    f.create_dataset(k, data=data, compression="gzip", shuffle=True, chunks=(4,) + data.shape[1:])
            if edit is not None:
                edit(f)
    return path, table


def npy_bytes(arr) -> bytes:
    buf = io.BytesIO()
    np.lib.format.write_array(buf, np.asarray(arr), allow_pickle=False)
    return buf.getvalue()


def fake_npy(shape, dtype, payload: bytes) -> bytes:
    """An .npy whose header declares ``shape`` followed by only ``payload``."""
    buf = io.BytesIO()
    np.lib.format.write_array_header_1_0(buf, {"descr": np.lib.format.dtype_to_descr(np.dtype(dtype)),
                                               "fortran_order": False, "shape": tuple(shape)})
    return buf.getvalue() + payload


def write_npz(path: Path, members: dict, compressed=False) -> None:
    """A .npz from ``name -> array or raw .npy bytes``."""
    mode = zipfile.ZIP_DEFLATED if compressed else zipfile.ZIP_STORED
    with zipfile.ZipFile(path, "w", mode) as zf:
        for name, value in members.items():
            zf.writestr(name + ".npy", value if isinstance(value, bytes) else npy_bytes(value))


def h5_chunk(path: Path, key: str, index=0) -> tuple[int, int]:
    with h5py.File(path, "r") as f:
        info = f[key].id.get_chunk_info(index)
        return int(info.byte_offset), int(info.size)


def h5_header(path: Path, key: str) -> int:
    with h5py.File(path, "r") as f:
        return int(h5py.h5o.get_info(f[key].id).addr)


def zip_member(path: Path, name: str) -> tuple[int, int]:
    """(offset of the member's compressed data, its compressed size)."""
    with zipfile.ZipFile(path) as zf:
        info = zf.getinfo(name + ".npy")
    with open(path, "rb") as fh:
        fh.seek(info.header_offset + 26)
        n, m = np.frombuffer(fh.read(4), dtype="<u2").tolist()
    return info.header_offset + 30 + n + m, info.compress_size


def replace(f, name, data=None, **kw):
    if name in f or f.get(name, getlink=True) is not None:
        del f[name]
    if data is None:
        f.create_dataset(name, **kw)
    else:
        f[name] = data


# ---- the named cases -------------------------------------------------------------------------
def _grouped_cases(rng_seed: int) -> list[Case]:
    cases = []

    def add(name, edit, needles, expect="refuse", gzip=False, damage=None, table_edit=None, file=None):
        def make(d: Path) -> Made:
            rng = np.random.default_rng([rng_seed, len(name)])
            path, table = grouped_log(d, seed=3, edit=edit, gzip=gzip)
            if damage is not None:
                damage(path, rng)
            lay = table_edit(table) if table_edit is not None else table
            return Made(path, _layout(d, lay), expect, list(needles), file=file)
        cases.append(Case(f"grouped {name}", "grouped", make))

    def chunk_damage(key):
        def damage(path, rng):
            off, size = h5_chunk(path, key)
            _damage(path, off + size // 3, max(8, size // 3), rng)
        return damage

    def header_damage(key, skip=0, n=24):
        def damage(path, rng):
            _damage(path, h5_header(path, key) + skip, n, rng)
        return damage

    add("corrupt chunk of an observation", None, ["runs/ep2/obs", "episode 2"], gzip=True,
        damage=chunk_damage("runs/ep2/obs"))
    add("corrupt chunk of an action", None, ["runs/ep0/act", "episode 0"], gzip=True,
        damage=chunk_damage("runs/ep0/act"))
    add("corrupt dataset object header", None, ["runs/ep1/act", "episode 1", "may be corrupt"],
        damage=header_damage("runs/ep1/act"))
    def btree_damage(key, signature=b"TREE"):
        def damage(path, rng):
            start = h5_header(path, key)
            at = path.read_bytes().index(signature, start)
            _damage(path, at, 12, rng)
        return damage

    add("corrupt B-tree of an episode group", None, ["runs/ep3"], damage=btree_damage("runs/ep3"))
    add("corrupt local heap of an episode group", None, ["runs/ep1"], damage=btree_damage("runs/ep1", b"HEAP"))
    add("soft link loop among episodes", lambda f: f["runs"].__setitem__("ep4", h5py.SoftLink("/runs/ep4")),
        ["runs/ep4", "soft link loop"])
    add("two soft links pointing at each other",
        lambda f: (f["runs"].__setitem__("ep4", h5py.SoftLink("/runs/ep5")),
                   f["runs"].__setitem__("ep5", h5py.SoftLink("/runs/ep4"))),
        ["runs/ep4", "soft link loop"])
    add("dangling soft link among episodes", lambda f: f["runs"].__setitem__("ep4", h5py.SoftLink("/gone")),
        ["runs/ep4", "dangling"])
    add("external link to a missing file among episodes",
        lambda f: f["runs"].__setitem__("ep4", h5py.ExternalLink("missing.h5", "/runs/ep0")),
        ["runs/ep4", "external link"])
    add("soft link to another episode", lambda f: f["runs"].__setitem__("ep4", h5py.SoftLink("/runs/ep1")),
        ["runs/ep4", "same group as runs/ep1"])
    add("key soft-linked to another episode's dataset",
        lambda f: replace(f, "runs/ep1/act", h5py.SoftLink("/runs/ep0/act")),
        ["runs/ep1/act", "episode 1", "same dataset as key runs/ep0/act of episode 0"])
    add("key that is a soft link loop", lambda f: replace(f, "runs/ep1/obs", h5py.SoftLink("/runs/ep1/obs")),
        ["runs/ep1/obs", "soft link loop"])
    add("key that is a dangling soft link", lambda f: replace(f, "runs/ep2/rew", h5py.SoftLink("/nothing/here")),
        ["runs/ep2/rew", "dangling"])
    add("key that is an external link", lambda f: replace(f, "runs/ep2/obs", h5py.ExternalLink("other.h5", "/obs")),
        ["runs/ep2/obs", "external link"])
    add("absolute layout key", None, ["keys.action", "absolute path"], file="layout.toml",
        table_edit=lambda t: Layout(shape="grouped", episode_groups="runs/*",
                                    keys=Keys(observation="obs", action="/runs/ep0/act")))
    for rows in (10 ** 10, 10 ** 12, 2 ** 31 + 1):
        add(f"declared {rows} action rows (chunked, empty)",
            lambda f, rows=rows: replace(f, "runs/ep2/act", shape=(rows, 3), dtype="f4", chunks=(1024, 3)),
            ["runs/ep2/act", "episode 2", f"declares {rows} rows"])
    add("declared 10**10 observation columns",
        lambda f: replace(f, "runs/ep1/obs", shape=(5, 10 ** 10), dtype="f4", chunks=(1, 4096)),
        ["runs/ep1/obs", "values per row"])
    add("declared 10**12 rows and columns",
        lambda f: replace(f, "runs/ep0/obs", shape=(10 ** 12, 10 ** 12), dtype="f8", chunks=(16, 16)),
        ["runs/ep0/obs", "declares"])
    add("contiguous dataset declared larger than the file",
        lambda f: replace(f, "runs/ep3/obs", shape=(10 ** 9, 5), dtype="f4", chunks=None),
        ["runs/ep3/obs", "more than the file can hold"])
    add("compressed dataset declared beyond deflate's ratio",
        lambda f: replace(f, "runs/ep3/obs", shape=(2 ** 30, 5), dtype="f8", chunks=(4096, 5),
                          compression="gzip"),
        ["runs/ep3/obs", "the most deflate can expand"])
    for key, shape in (("obs", lambda T: (T + 1, 0)), ("act", lambda T: (T, 0)), ("goal", lambda T: (T, 0))):
        def edit(f, key=key, shape=shape):
            for e, T in enumerate(LENGTHS):
                replace(f, f"runs/ep{e}/{key}", np.zeros(shape(T), np.float32))
        add(f"zero-width {key} in every episode", edit, [f"runs/ep0/{key}", "zero width"])
    add("task id above int64 (uint64 attribute)",
        lambda f: f["runs/ep2"].attrs.__setitem__("task", np.uint64(2 ** 63 + 5)),
        ["runs/ep2/task", "episode 2", "9223372036854775813 is above the int64 maximum"])
    add("fractional float task id", lambda f: f["runs/ep1"].attrs.__setitem__("task", 2.5),
        ["runs/ep1/task", "episode 1", "task id 2.5"])
    add("task ids at int64's edges, negative, uint64 and integral float",
        lambda f: (f["runs/ep0"].attrs.__setitem__("task", np.int64(np.iinfo(np.int64).min)),
                   f["runs/ep1"].attrs.__setitem__("task", np.int64(np.iinfo(np.int64).max)),
                   f["runs/ep2"].attrs.__setitem__("task", np.int64(-7)),
                   f["runs/ep3"].attrs.__setitem__("task", np.uint64(2 ** 63 - 1))),
        [], expect="accept")
    add("integral float task ids", lambda f: [f[f"runs/ep{e}"].attrs.__setitem__("task", float(e)) for e in range(4)],
        [], expect="accept")
    add("unrelated soft link loop outside the episode groups",
        lambda f: f.__setitem__("scratch", h5py.SoftLink("/scratch")), [], expect="accept")
    return cases


def _file_cases() -> list[Case]:
    """Whole-file problems, one per reader."""
    cases = []

    def add(name, fmt, make):
        cases.append(Case(name, fmt, make))

    def good(d, fmt):
        if fmt == "grouped":
            return grouped_log(d)
        if fmt == "per-file":
            eps = make_episodes(LENGTHS, seed=0)
            return d / "eps", write_per_file(d / "eps", eps)
        return flat_log(d, fmt="h5" if fmt == "flat-h5" else "npz")

    for fmt in ("grouped", "flat-h5", "flat-npz"):
        def empty(d, fmt=fmt):
            path, table = good(d, fmt)
            path.write_bytes(b"")
            return Made(path, _layout(d, table), needles=[])

        def truncated(d, fmt=fmt):
            path, table = good(d, fmt)
            data = path.read_bytes()
            path.write_bytes(data[: len(data) // 2])
            return Made(path, _layout(d, table), needles=[])

        def text(d, fmt=fmt):
            path, table = good(d, fmt)
            path.write_text("episode,step,x\n0,0,1.5\n")
            return Made(path, _layout(d, table), needles=[])

        def self_link(d, fmt=fmt):
            path, table = good(d, fmt)
            path.unlink()
            os.symlink(path.name, path)
            return Made(path, _layout(d, table), needles=["symbolic link loop"], inputs=[])

        def directory(d, fmt=fmt):
            path, table = good(d, fmt)
            path.unlink()
            path.mkdir()
            return Made(path, _layout(d, table), needles=["got a directory"], inputs=[])

        add(f"{fmt} empty file", fmt, empty)
        add(f"{fmt} truncated file", fmt, truncated)
        add(f"{fmt} text file", fmt, text)
        add(f"{fmt} path is a symlink to itself", fmt, self_link)
        add(f"{fmt} path is a directory", fmt, directory)
    return cases


def _flat_h5_cases(rng_seed: int) -> list[Case]:
    cases = []

    def add(name, edit, needles, expect="refuse", gzip=False, damage=None, **kw):
        def make(d: Path) -> Made:
            rng = np.random.default_rng([rng_seed, len(name), 7])
            path, table = flat_log(d, seed=4, fmt="h5", edit=edit, gzip=gzip, **kw)
            if damage is not None:
                damage(path, rng)
            return Made(path, _layout(d, table), expect, list(needles))
        cases.append(Case(f"flat-h5 {name}", "flat-h5", make))

    def chunk_damage(key, index):
        def damage(path, rng):
            off, size = h5_chunk(path, key, index)
            _damage(path, off + size // 3, max(8, size // 3), rng)
        return damage

    add("corrupt chunk of the observations", None, ["key obs", "rows"], gzip=True,
        damage=chunk_damage("obs", 2))
    add("corrupt chunk of the episode ids", None, ["key episode"], gzip=True,
        damage=chunk_damage("episode", 1))
    add("declared 10**12 episode ids", lambda f: replace(f, "episode", shape=(10 ** 12,), dtype="i8", chunks=(4096,)),
        ["key episode", "declares shape (1000000000000,)"])
    add("declared 2**40 + 1 action rows", lambda f: replace(f, "act", shape=(2 ** 40 + 1, 3), dtype="f4",
                                                            chunks=(4096, 3)),
        ["key act", "rows"])
    add("declared 10**10 observation columns", lambda f: replace(f, "obs", shape=(18, 10 ** 10), dtype="f4",
                                                                 chunks=(1, 4096)),
        ["key obs", "values per row"])
    add("zero-width observations", lambda f: replace(f, "obs", np.zeros((STATES, 0), np.float32)),
        ["key obs", "zero width"])
    add("zero-width goals", lambda f: replace(f, "goal", np.zeros((sum(LENGTHS), 0), np.float32)),
        ["key goal", "zero width"])
    add("observation key is a soft link loop", lambda f: replace(f, "obs", h5py.SoftLink("/obs")),
        ["key obs", "soft link loop"])
    add("action key is a dangling soft link", lambda f: replace(f, "act", h5py.SoftLink("/moved/act")),
        ["key act", "dangling"])
    add("reward key is an external link", lambda f: replace(f, "rew", h5py.ExternalLink("elsewhere.h5", "/rew")),
        ["key rew", "external link"])
    big = np.repeat(np.array([1, 2, 2 ** 64 - 1, 3], dtype=np.uint64), LENGTHS)
    add("uint64 task id above int64", lambda f: replace(f, "task", big),
        ["key task", "episode 2", "step 0", "18446744073709551615 is above the int64 maximum"])
    edges = np.repeat(np.array([np.iinfo(np.int64).min, np.iinfo(np.int64).max, -1, 0], dtype=np.int64), LENGTHS)
    add("task ids at int64's edges", lambda f: replace(f, "task", edges), [], expect="accept")
    frac = np.repeat(np.array([0.0, 1.0, 1.5, 2.0]), LENGTHS)
    add("fractional float task ids", lambda f: replace(f, "task", frac), ["key task", "episode 2", "task id 1.5"])
    add("soft link to a key (resolved inside the file)",
        lambda f: (f.move("rew", "store_rew"), f.__setitem__("rew", h5py.SoftLink("/store_rew"))),
        [], expect="accept")
    return cases


def _flat_npz_cases(rng_seed: int) -> list[Case]:
    cases = []

    def add(name, build, needles, expect="refuse"):
        def make(d: Path) -> Made:
            rng = np.random.default_rng([rng_seed, len(name), 11])
            path, table = flat_log(d, seed=5, fmt="npz")
            build(path, rng)
            return Made(path, _layout(d, table), expect, list(needles))
        cases.append(Case(f"flat-npz {name}", "flat-npz", make))

    def arrays(path):
        with np.load(path, allow_pickle=False) as z:
            return {k: z[k] for k in z.files}

    def header(key, shape, compressed):
        def build(path, rng):
            a = arrays(path)
            a[key] = fake_npy(shape, a[key].dtype, a[key].tobytes())
            write_npz(path, a, compressed)
        return build

    for shape, c in (((10 ** 10, 3), False), ((10 ** 10, 3), True), ((10 ** 12, 3), False), ((14, 10 ** 9), True)):
        add(f"act header declares {shape} ({'deflated' if c else 'stored'})", header("act", shape, c), ["key act"])
    add("episode ids header declares 10**12 rows", header("episode", (10 ** 12,), False),
        ["key episode", "declares shape (1000000000000,)"])

    def deflate_damage(key):
        def build(path, rng):
            write_npz(path, arrays(path), compressed=True)
            off, size = zip_member(path, key)
            _damage(path, off + size // 2, max(8, size // 4), rng)
        return build

    add("corrupt deflated observations", deflate_damage("obs"), ["key obs"])
    add("corrupt deflated episode ids", deflate_damage("episode"), ["key episode"])

    def zero_width(path, rng):
        a = arrays(path)
        a["obs"] = np.zeros((STATES, 0), np.float32)
        write_npz(path, a)
    add("zero-width observations", zero_width, ["key obs", "zero width"])

    def objects(path, rng):
        a = arrays(path)
        a["rew"] = np.array([None] * sum(LENGTHS), dtype=object)
        with zipfile.ZipFile(path, "w") as zf:
            for k, v in a.items():
                buf = io.BytesIO()
                np.lib.format.write_array(buf, v, allow_pickle=True)
                zf.writestr(k + ".npy", buf.getvalue())
    add("pickled object member", objects, ["key rew", "object"])

    def task_u64(path, rng):
        a = arrays(path)
        a["task"] = np.array([0, 2 ** 63, 1, 2], dtype=np.uint64)     # one per episode
        write_npz(path, a)
    add("uint64 task id above int64, one per episode", task_u64, ["key task", "episode 1", "9223372036854775808"])
    return cases


def _per_file_cases(rng_seed: int) -> list[Case]:
    cases = []

    def add(name, build, needles, expect="refuse", file=None, compressed=False):
        def make(d: Path) -> Made:
            rng = np.random.default_rng([rng_seed, len(name), 13])
            eps = make_episodes(LENGTHS, seed=6)
            table = write_per_file(d / "eps", eps, compressed=compressed)
            build(d / "eps", rng)
            return Made(d / "eps", _layout(d, table), expect, list(needles), file=file)
        cases.append(Case(f"per-file {name}", "per-file", make))

    def arrays(path):
        with np.load(path, allow_pickle=False) as z:
            return {k: z[k] for k in z.files}

    def huge(d, rng):
        a = arrays(d / "ep2.npz")
        a["act"] = fake_npy((10 ** 10, 3), a["act"].dtype, a["act"].tobytes())
        write_npz(d / "ep2.npz", a)
    add("episode file whose header declares 10**10 rows", huge, ["ep2.npz", "key act", "episode 2"])

    def deflate_damage(d, rng):
        off, size = zip_member(d / "ep1.npz", "obs")
        _damage(d / "ep1.npz", off + size // 2, max(8, size // 4), rng)
    add("corrupt deflated member", deflate_damage, ["ep1.npz", "key obs"], compressed=True)

    def junk(d, rng):
        (d / "ep3.npz").write_bytes(noise(rng, 300))
    add("episode file that is not a zip", junk, ["ep3.npz"])

    def loop(d, rng):
        os.symlink("ep9.npz", d / "ep9.npz")
    add("symlink loop among the episode files", loop, ["ep9.npz", "symbolic link loop"])

    def dangling(d, rng):
        os.symlink("gone.npz", d / "ep9.npz")
    add("dangling symlink among the episode files", dangling, ["ep9.npz", "dangling"])

    def dup(d, rng):
        os.symlink("ep0.npz", d / "ep9.npz")
    add("symlink to another episode's file", dup, ["ep9.npz", "same file as"])

    def subdir(d, rng):
        (d / "ep9.npz").mkdir()
    add("directory named like an episode file", subdir, ["ep9.npz", "directory"])

    def zero_width(d, rng):
        for e, T in enumerate(LENGTHS):
            a = arrays(d / f"ep{e}.npz")
            a["obs"] = np.zeros((T + 1, 0), np.float32)
            write_npz(d / f"ep{e}.npz", a)
    add("zero-width observations", zero_width, ["ep0.npz", "key obs", "zero width"])

    def task_u64(d, rng):
        a = arrays(d / "ep1.npz")
        a["task"] = np.uint64(2 ** 64 - 1)
        write_npz(d / "ep1.npz", a)
    add("uint64 task id above int64", task_u64, ["ep1.npz", "key task", "episode 1"])
    return cases


def _embed_cases() -> list[Case]:
    """Precomputed goal vectors: zero width and an absurd header (``goalkit embed --values``)."""
    cases = []

    def add(name, values):
        def make(d: Path) -> Made:
            path, table = grouped_log(d)
            v = d / "values.npy"
            v.write_bytes(values())
            return Made(path, _layout(d, table), "refuse", ["values.npy"], file="values.npy",
                        inputs=[path, v])
        cases.append(Case(f"embed {name}", "embed", make))

    add("precomputed values of width 0", lambda: npy_bytes(np.zeros((STATES, 0), np.float32)))
    add("precomputed values declaring 10**10 rows", lambda: fake_npy((10 ** 10, 3), "f4", b"\0" * 64))
    return cases


def default_cases(seed: int = 0) -> list[Case]:
    """The named malformed cases (fast)."""
    return (_grouped_cases(seed) + _file_cases() + _flat_h5_cases(seed) + _flat_npz_cases(seed)
            + _per_file_cases(seed) + _embed_cases())


# ---- the full corpus -------------------------------------------------------------------------
def _random_damage(fmt: str, seed: int) -> Case:
    """Random bytes overwritten somewhere in a compressed log (seeded)."""
    def make(d: Path) -> Made:
        rng = np.random.default_rng([seed, 99])
        if fmt == "grouped":
            path, table = grouped_log(d, seed=seed, gzip=True)
            target = path
        elif fmt == "flat-h5":
            path, table = flat_log(d, seed=seed, fmt="h5", gzip=True)
            target = path
        elif fmt == "flat-npz":
            path, table = flat_log(d, seed=seed, fmt="npzc")
            target = path
        else:
            eps = make_episodes(LENGTHS, seed=seed)
            path = d / "eps"
            table = write_per_file(path, eps, compressed=True)
            target = path / f"ep{int(rng.integers(0, len(LENGTHS)))}.npz"
        size = target.stat().st_size
        n = int(rng.integers(1, 65))
        _damage(target, int(rng.integers(0, max(1, size - n))), n, rng)
        return Made(path, _layout(d, table), "any", [], file=target.name)
    return Case(f"{fmt} random damage seed {seed}", fmt, make)


def _shape_grid() -> list[Case]:
    """Declared shapes at and past the limits, for every reader."""
    cases = []
    rows_grid = (0, 2 ** 31 + 1, 10 ** 10, 10 ** 11, 10 ** 12, 2 ** 40 + 1, 2 ** 62)
    width_grid = (0, 1_000_001, 10 ** 8, 10 ** 10)
    for fmt in ("grouped", "flat-h5", "flat-npz"):
        for rows in rows_grid:
            for width in (3,) + width_grid:
                if (rows == 0 and width == 3) or (fmt != "flat-npz" and rows * width * 4 >= 2 ** 63):
                    continue                     # HDF5 cannot describe more than 2**63 bytes
                def make(d, fmt=fmt, rows=rows, width=width):
                    shape = (rows, width)
                    chunks = None if 0 in shape else (min(rows, 64), min(width, 64))
                    if fmt == "grouped":
                        path, table = grouped_log(d, edit=lambda f: replace(
                            f, "runs/ep1/act", shape=shape, dtype="f4", chunks=chunks))
                        key = "runs/ep1/act"
                    elif fmt == "flat-h5":
                        path, table = flat_log(d, fmt="h5", edit=lambda f: replace(
                            f, "act", shape=shape, dtype="f4", chunks=chunks))
                        key = "key act"
                    else:
                        path, table = flat_log(d, fmt="npz")
                        with np.load(path, allow_pickle=False) as z:
                            a = {k: z[k] for k in z.files}
                        a["act"] = fake_npy(shape, "f4", a["act"].tobytes())
                        write_npz(path, a)
                        key = "key act"
                    return Made(path, _layout(d, table), "refuse", [key])
                cases.append(Case(f"{fmt} act declared {rows} x {width}", fmt, make))
    return cases


def _task_grid() -> list[Case]:
    """Task ids of every integer dtype at its edges, and floats (grouped attributes)."""
    cases = []
    values = []
    for dt in ("i1", "i2", "i4", "i8", "u1", "u2", "u4", "u8"):
        info = np.iinfo(dt)
        for v in (info.min, info.max, 0):
            ok = int(v) <= np.iinfo(np.int64).max
            values.append((np.dtype(dt).type(v), ok))
    values += [(np.float64(3.0), True), (np.float64(-2.0 ** 63), True), (np.float64(2.0 ** 63), False),
               (np.float64(np.nan), False), (np.float64(np.inf), False), (np.float32(0.5), False),
               (np.bool_(True), False)]
    for v, ok in values:
        def make(d, v=v, ok=ok):
            path, table = grouped_log(d, edit=lambda f: f["runs/ep2"].attrs.__setitem__("task", v))
            return Made(path, _layout(d, table), "accept" if ok else "refuse",
                        [] if ok else ["runs/ep2/task", "episode 2"])
        cases.append(Case(f"grouped task id {v!r} ({np.asarray(v).dtype})", "grouped", make))
    return cases


def full_cases(seed: int = 0, random_per_format: int = 40) -> tuple[list[Case], list[Case]]:
    """``(in_process, subprocess)``: the shape and task-id grids (in process) and seeded random
    damage (each run in its own process: damaged HDF5 metadata could take the process down)."""
    damaged = [_random_damage(fmt, seed * 1000 + i) for fmt in ("grouped", "flat-h5", "flat-npz", "per-file")
               for i in range(random_per_format)]
    return _shape_grid() + _task_grid(), damaged
