"""Shared test helpers: edit a built set and re-seal it, as a deliberate editor would.

After :func:`tamper` the column's manifest entry and the set's seal match again, so only
verify's re-derivation can tell.
"""

import hashlib
import json
import os
import shutil
import signal
from pathlib import Path

import h5py
import numpy as np

from goalkit.errors import GoalkitError
from goalkit.write.seal import write_seal
from goalkit.write.verify import verify_set


def reseal(path):
    """Recompute every manifest entry of the stored columns and the seal, in place."""
    with h5py.File(path, "r+") as f:
        manifest = json.loads(f.attrs["manifest"])
        for key in manifest:
            split, name = key.split("/", 1)
            if split in f and name in f[split] and f[split][name].shape[0] < 10 ** 9:  # not a huge declared one
                data = f[split][name][:]
                manifest[key] = hashlib.sha256(np.ascontiguousarray(data).tobytes()).hexdigest()
        f.attrs["manifest"] = json.dumps(manifest, sort_keys=True)
        if "seal" in f.attrs:
            write_seal(f)


def tamper(path, split, column, edit):
    """Apply ``edit`` (in place, on the column's array) and re-seal the manifest entry and seal."""
    with h5py.File(path, "r+") as f:
        data = f[split][column][:]
        edit(data)
        f[split][column][...] = data
        manifest = json.loads(f.attrs["manifest"])
        manifest[f"{split}/{column}"] = hashlib.sha256(np.ascontiguousarray(data).tobytes()).hexdigest()
        f.attrs["manifest"] = json.dumps(manifest, sort_keys=True)
        if "seal" in f.attrs:
            write_seal(f)


# ---- a generated suite of single modifications of a built set -----------------------------------
#
# Each case is (name, edit, reseal): ``edit(f, tmp)`` changes an open h5py.File (r+) in place;
# ``reseal`` says whether a resealed variant (manifest and seal recomputed afterwards, as a
# deliberate editor would) is still a modification worth checking.

SPLITS = ("train", "validation")


def _bump_leaf(value):
    """A different value of the same JSON type."""
    if isinstance(value, bool):
        return not value
    if isinstance(value, int):
        return value + 1
    if isinstance(value, float):
        return value + 0.5 if value == value else 0.0
    if isinstance(value, str):
        if len(value) == 64 and all(c in "0123456789abcdef" for c in value):
            return value[:-1] + ("0" if value[-1] != "0" else "1")   # another valid SHA-256
        return value + "x"
    if value is None:
        return 1
    if isinstance(value, list):
        return value + [0]
    if isinstance(value, dict):
        return {**value, "extra": 1}
    raise TypeError(type(value))


def json_leaves(value, at=()):
    """Paths of every leaf (scalars and empty containers) of a JSON value."""
    if isinstance(value, dict) and value:
        for k in sorted(value):
            yield from json_leaves(value[k], at + (k,))
    elif isinstance(value, list) and value:
        for i, v in enumerate(value):
            yield from json_leaves(v, at + (i,))
    else:
        yield at


def _set_leaf(doc, at, fn):
    target = doc
    for k in at[:-1]:
        target = target[k]
    target[at[-1]] = fn(target[at[-1]])


def _edit_json(attr, at, fn=_bump_leaf):
    def edit(f, tmp):
        doc = json.loads(f.attrs[attr])
        if at:
            _set_leaf(doc, at, fn)
        else:
            doc = fn(doc)
        f.attrs[attr] = json.dumps(doc, sort_keys=True)
    return edit


def _drop_key(attr, key):
    def edit(f, tmp):
        doc = json.loads(f.attrs[attr])
        del doc[key]
        f.attrs[attr] = json.dumps(doc, sort_keys=True)
    return edit


def _set_attr(name, value, group=None):
    def edit(f, tmp):
        (f if group is None else f[group]).attrs[name] = value
    return edit


def _del_attr(name, group=None):
    def edit(f, tmp):
        del (f if group is None else f[group]).attrs[name]
    return edit


def _rewrite(group, name, data):
    del group[name]
    group.create_dataset(name, data=data, chunks=True if data.size else None, compression="gzip")


def _column_edit(split, name, kind):
    def edit(f, tmp):
        group = f[split]
        ds = group[name]
        if kind == "value":
            data = ds[:]
            flat = data.reshape(-1)
            flat[0] = flat[0] ^ 1 if data.dtype.kind == "u" else flat[0] + 1
            ds[...] = data
        elif kind == "delete":
            del group[name]
        elif kind == "delete+manifest":
            del group[name]
            manifest = json.loads(f.attrs["manifest"])
            del manifest[f"{split}/{name}"]
            f.attrs["manifest"] = json.dumps(manifest, sort_keys=True)
        elif kind == "extra":
            group.create_dataset(name + "_extra", data=ds[:])
        elif kind == "append":
            data = ds[:]
            _rewrite(group, name, np.concatenate([data, data[-1:]]))
        elif kind == "truncate":
            _rewrite(group, name, ds[:-1])
        elif kind == "dtype":
            data = ds[:]
            _rewrite(group, name, data.astype(np.float64 if data.dtype != np.float64 else np.float32))
    return edit


def _append_to_every_column(split):
    def edit(f, tmp):
        group = f[split]
        for name in list(group):
            data = group[name][:]
            _rewrite(group, name, np.concatenate([data, data[-1:]]))
    return edit


def _link(split, name, kind):
    def edit(f, tmp):
        group = f[split]
        if kind == "soft":
            group[name + "_moved"] = group[name][:]
            del group[name]
            group[name] = h5py.SoftLink(f"/{split}/{name}_moved")
        elif kind == "external":
            other = tmp / "elsewhere.h5"
            with h5py.File(other, "w") as g:
                g["data"] = group[name][:]
            del group[name]
            group[name] = h5py.ExternalLink(str(other), "data")
        elif kind == "huge":
            ds = group[name]
            dtype, shape = ds.dtype, ds.shape[1:]
            del group[name]
            group.create_dataset(name, shape=(10 ** 12, *shape), dtype=dtype, chunks=(4096, *shape))
    return edit


def _huge_rows(split, columns_too=False):
    def edit(f, tmp):
        f[split].attrs["rows"] = 10 ** 12
        if columns_too:  # every column declared that long (nothing stored: a few bytes of file)
            for name in list(f[split]):
                ds = f[split][name]
                dtype, shape = ds.dtype, ds.shape[1:]
                del f[split][name]
                f[split].create_dataset(name, shape=(10 ** 12, *shape), dtype=dtype, chunks=(4096, *shape))
    return edit


def _source_path(kind):
    """Point the first log file entry (or the logs path) at a device file or a FIFO."""
    def edit(f, tmp):
        prov = json.loads(f.attrs["provenance"])
        fifo = tmp / "a-fifo"
        if not fifo.exists():
            os.mkfifo(fifo)
        if kind == "dev-zero":
            prov["log_files"][0].update(path="/dev/zero")
        elif kind == "fifo":
            prov["log_files"][0].update(path=str(fifo))
        elif kind == "logs-fifo":
            prov["log_files"] = []
            prov["logs_path"] = str(fifo)
        elif kind == "layout-fifo":
            prov["layout_path"] = str(fifo)
        f.attrs["provenance"] = json.dumps(prov, sort_keys=True)
    return edit


def _recipe_numbers(text):
    """(line number, new line) for each line of the recipe text that sets a number."""
    import re

    out = []
    for i, line in enumerate(text.splitlines()):
        m = re.match(r"(\s*[\w.]+\s*=\s*)(-?[0-9.]+)(.*)", line)
        if m:
            value = m.group(2)
            new = str(float(value) * 1.5 + 0.25) if "." in value else str(int(value) + 1)
            out.append((i, m.group(1) + new + m.group(3)))
    return out


def _recipe_line(i, new):
    def edit(f, tmp):
        lines = str(f.attrs["recipe"]).splitlines()
        lines[i] = new
        f.attrs["recipe"] = "\n".join(lines) + "\n"
    return edit


#: Columns whose edits are also checked resealed in the default suite (all with ``full``).
RESEALED_COLUMNS = ("goal", "reward", "strategy")


def tamper_suite(path, full=False):
    """The single modifications of the set at ``path``: a list of (name, edit, reseal).

    Every column edit is applied to every column of the train split and to the columns of
    :data:`RESEALED_COLUMNS` of the validation split, and is worth a resealed variant for those
    columns; with ``full``, to every column of both splits, each also resealed. Every second
    leaf of the summary is changed only with ``full``.
    """
    with h5py.File(path, "r") as f:
        attrs = {k: f.attrs[k] for k in f.attrs}
        columns = {s: sorted(f[s]) for s in SPLITS}
    cases = []
    # root attributes: deleted, given another value of the same type, given a value of another type
    for name, value in sorted(attrs.items()):
        cases.append((f"attr {name}: deleted", _del_attr(name), False))
        if isinstance(value, str):
            cases.append((f"attr {name}: number instead of text", _set_attr(name, 7), False))
        else:
            cases.append((f"attr {name}: text instead of a number", _set_attr(name, "7"), False))
            cases.append((f"attr {name}: changed", _set_attr(name, value + 1), True))
    for name in ("provenance", "summary", "manifest"):
        doc = json.loads(attrs[name])
        cases.append((f"attr {name}: not JSON", _set_attr(name, "{not json"), False))
        cases.append((f"attr {name}: JSON but not an object", _set_attr(name, "[1, 2]"), False))
        for n, at in enumerate(json_leaves(doc)):
            if not full and name == "summary" and n % 2:
                continue   # the summary's numbers repeat one pattern per split and strategy: half by default
            cases.append((f"{name}.{'.'.join(map(str, at))}: changed", _edit_json(name, at), name != "manifest"))
        for key in sorted(doc):
            cases.append((f"{name}.{key}: deleted", _drop_key(name, key), name != "manifest"))
    cases.append(("attr recipe: not TOML", _set_attr("recipe", "this is = = not toml"), True))
    for i, line in _recipe_numbers(str(attrs["recipe"])):
        cases.append((f"recipe line {i + 1}: {line.strip()}", _recipe_line(i, line), True))
    cases.append(("provenance.layout_text: not TOML",
                  _edit_json("provenance", ("layout_text",), lambda v: "[[[ not toml"), True))
    cases.append(("attr seed: changed to 7", _set_attr("seed", np.int64(7)), True))
    cases.append(("extra root attribute", _set_attr("note", "hello"), True))
    cases.append(("extra root attribute without a value", _set_attr("note", h5py.Empty("f4")), True))
    cases.append(("attr seed: no value", _set_attr("seed", h5py.Empty("i8")), True))
    cases.append(("group train.rows: no value", _set_attr("rows", h5py.Empty("i8"), "train"), True))
    cases.append(("extra root member", lambda f, tmp: f.create_group("extra"), True))
    # split groups
    for s in SPLITS:
        cases.append((f"group {s}: deleted", lambda f, tmp, s=s: f.__delitem__(s), True))
        for a in ("rows", "episodes"):
            value = int(f_attr(path, s, a))
            cases.append((f"group {s}.{a}: +1", _set_attr(a, value + 1, s), True))
            if value:
                cases.append((f"group {s}.{a}: -1", _set_attr(a, value - 1, s), True))
            cases.append((f"group {s}.{a}: deleted", _del_attr(a, s), True))
            cases.append((f"group {s}.{a}: text", _set_attr(a, "7", s), True))
        cases.append((f"group {s}: extra attribute", _set_attr("note", 1, s), True))
        cases.append((f"column {s}/goal: extra attribute", _set_attr("note", 1, f"{s}/goal"), True))
        cases.append((f"group {s}: a row appended to every column, rows kept", _append_to_every_column(s), True))
        cases.append((f"group {s}: rows attribute 10**12", _huge_rows(s), True))
        cases.append((f"group {s}: rows attribute and every column 10**12 rows", _huge_rows(s, True), True))
    # columns
    kinds = ("value", "delete", "delete+manifest", "extra", "append", "truncate", "dtype")
    for s in SPLITS:
        for name in columns[s] if full or s == "train" else RESEALED_COLUMNS:
            resealed = full or name in RESEALED_COLUMNS
            for kind in kinds:
                cases.append((f"column {s}/{name}: {kind}", _column_edit(s, name, kind), resealed))
    for kind in ("soft", "external", "huge"):
        for s in SPLITS:
            cases.append((f"column {s}/reward: {kind} link" if kind != "huge" else
                          f"column {s}/reward: declared 10**12 rows", _link(s, "reward", kind), True))
    # source files that are not regular files (a crafted set must not make verify hang)
    for kind in ("dev-zero", "fifo", "logs-fifo", "layout-fifo"):
        cases.append((f"source file: {kind}", _source_path(kind), True))
    return cases


def f_attr(path, group, name):
    with h5py.File(path, "r") as f:
        return f[group].attrs[name]


#: Seconds one verify may take on the small set before it counts as a hang.
HANG_SECONDS = 20


class _Hang(Exception):
    pass


def _alarm(*_):
    raise _Hang()


def outcome(path):
    """(status, detail) of verify on ``path``: 0 consistent, 1 failures, 2 DatasetError, "traceback", "hang".

    Runs in the main thread (the hang guard is SIGALRM).
    """
    old = signal.signal(signal.SIGALRM, _alarm)
    signal.alarm(HANG_SECONDS)
    try:
        report = verify_set(path, max_failures=3)
        return (0 if report.ok else 1), report.failures
    except GoalkitError as exc:
        return 2, str(exc)
    except _Hang:
        return "hang", ""
    except Exception as exc:  # a traceback for the user
        return "traceback", f"{type(exc).__name__}: {exc}"
    finally:
        signal.alarm(0)
        signal.signal(signal.SIGALRM, old)


def run_cases(demo_set, full: bool, workdir, part: int = 0, parts: int = 1) -> list:
    """Apply every ``parts``-th case of :func:`tamper_suite` from ``part`` on, each to its own copy of
    ``demo_set`` under ``workdir`` (as is, and resealed where it means something), and verify it.

    Returns one dict per check: case index, name, resealed, status and detail (see :func:`outcome`)
    and the path verified (removed after the check).
    """
    cases = tamper_suite(demo_set, full=full)
    out = []
    for i in range(part, len(cases), parts):
        name, edit, resealable = cases[i]
        for sealed in (False, True) if resealable else (False,):
            work = Path(workdir) / f"case{i}-{int(sealed)}"
            work.mkdir()
            path = work / "set.h5"
            shutil.copy(demo_set, path)
            with h5py.File(path, "r+") as f:
                edit(f, work)
            if sealed:
                reseal(path)
            status, detail = outcome(path)
            out.append({"index": i, "name": name, "resealed": sealed, "status": status, "detail": detail,
                        "path": str(path)})
            shutil.rmtree(work)
    return out
