"""The malformed-input corpus: a seeded, deterministic generator of cases for every command.

``generate(seed)`` returns the full corpus: every single bad value of every recipe and layout
key (through ``build``, ``tune``, ``scan`` and ``embed``), bad option values, files that are not
what they claim (folders, devices, empty, garbage), sets for ``verify`` that are not goalkit
sets, and seeded random combinations and truncations. ``quick(seed)`` is a seeded sample of it
that keeps every family, for the default test run.
"""

from __future__ import annotations

import random

from corpus_harness import FOLDER, Case

# ---- the recipe ----------------------------------------------------------------------------------
#: A valid recipe, as (table, key, TOML value); None is the top level.
RECIPE = [
    (None, "version", "1"), (None, "seed", "3"),
    ("logs", "path", '"{base}/gantry-logs.h5"'), ("logs", "layout", '"{base}/gantry-layout.toml"'),
    ("logs", "skip_bad_episodes", "false"),
    ("goal", "fields", '["head", "trays"]'), ("goal", "dtype", '"float32"'),
    ("relabel", "goals_per_transition", "3"), ("relabel", "gamma", "0.9"), ("relabel", "past_end", '"clip"'),
    ("relabel.weights", "original", "1"), ("relabel.weights", "future", "2"), ("relabel.weights", "geometric", "1"),
    ("reward", "distance", '"euclidean"'), ("reward", "threshold", "0.04"), ("reward", "inclusive", "true"),
    ("reward", "form", '"sparse"'), ("reward", "end_on_reach", "false"),
    ("split", "validation", "0.1"), ("split", "salt", "0"),
    ("output", "path", '"{dir}/out.h5"'), ("output", "mode", '"materialised"'), ("output", "compression", '"gzip"'),
    ("output", "chunk_rows", "4096"),
]

#: Bad values per recipe key (TOML literals). Each one alone must be refused with exit 2.
RECIPE_BAD = {
    (None, "version"): ["2", "0", '"1"'],
    (None, "seed"): ["-1", "1.5", "true", '"3"', "nan"],
    ("logs", "path"): ['"{dir}/missing.h5"', '"{dir}/folder"', '"{dir}/empty.h5"', '"{dir}/text.h5"', '""', "5",
                       '"/dev/zero"', '"/dev/null"'],
    ("logs", "layout"): ['"{dir}/missing.toml"', '"{dir}/folder"', '"/dev/zero"', '"/dev/null"', '""', "3"],
    ("logs", "skip_bad_episodes"): ['"yes"', "1"],
    ("goal", "fields"): ["[]", '["nope"]', '""', "[1, 2]", "5"],
    ("goal", "dtype"): ['"float16"', "32"],
    ("relabel", "goals_per_transition"): ["0", "-1", "9223372036854775807", "1025", "1.5", '"5"', "true", "nan"],
    ("relabel", "gamma"): ["0", "1", "1.5", "-0.1", "nan", "inf", '"0.9"'],
    ("relabel", "past_end"): ['"bogus"', "1"],
    ("relabel.weights", "future"): ["-1", "nan", "inf", '"2"', "true"],
    ("reward", "distance"): ['"bogus"', "3"],
    ("reward", "threshold"): ["-0.1", "nan", "inf", "-inf", '"0.04"', "[]", "[0.1, nan]", "true"],
    ("reward", "inclusive"): ['"yes"', "2"],
    ("reward", "form"): ['"bogus"', "[]"],
    ("reward", "end_on_reach"): ["2", '"no"'],
    ("split", "validation"): ["1.0", "-0.1", "nan", "2", '"0.1"'],
    ("split", "salt"): ["-1", "0.5"],
    ("output", "path"): ['"{dir}/folder"', '""', "7", '"{dir}/no-such-folder/out.h5"'],
    ("output", "mode"): ['"bogus"'],
    ("output", "compression"): ['"zstd"', "9"],
    ("output", "chunk_rows"): ["0", "255", "1099511627776", '"x"', "1.5"],
}

#: Files every recipe / layout case may point at (in the case folder).
PROPS = {"folder": FOLDER, "empty.h5": b"", "text.h5": "not an HDF5 file\n",
         "garbage.npz": bytes(range(256)) * 4}

#: Recipe keys whose bad values the error line must name (paths name the file instead).
NAMED = {k for k in RECIPE_BAD if k[1] not in ("path", "layout")}


def render(entries) -> str:
    """TOML text of ``(table, key, value)`` entries (tables in first-seen order)."""
    tables: dict = {}
    for table, key, value in entries:
        tables.setdefault(table, []).append(f"{key} = {value}")
    out = tables.pop(None, [])
    for table, lines in tables.items():
        out += ["", f"[{table}]", *lines]
    return "\n".join(out) + "\n"


def recipe(changes=None, drop=(), drop_tables=(), extra="") -> str:
    """The valid recipe with ``changes`` ({(table, key): value}), keys and tables removed."""
    changes = changes or {}
    entries = [(t, k, changes.get((t, k), v)) for t, k, v in RECIPE
               if (t, k) not in drop and t not in drop_tables and not (t or "").startswith(tuple(drop_tables))]
    return render(entries) + extra


def _name(key) -> str:
    return key[1] if key[0] is None else f"{key[0]}.{key[1]}"


def _needs_subprocess(text: str) -> bool:
    return isinstance(text, str) and "/dev/" in text


def recipe_case(name, text, command="build", contains=None) -> Case:
    args = ("build", "{dir}/recipe.toml") if command == "build" else ("tune", "{dir}/recipe.toml")
    return Case(f"{command}:{name}", args, files={"recipe.toml": text, **PROPS}, contains=contains,
                subprocess=_needs_subprocess(text), seconds=60.0 if _needs_subprocess(text) else 30.0)


def recipe_cases():
    for key, values in RECIPE_BAD.items():
        for value in values:
            text = recipe({key: value})
            hint = _name(key).split(".")[-1] if key in NAMED else None
            # tune reads the recipe but writes no dataset: [output] values are build's alone
            for command in ("build",) if key[0] == "output" else ("build", "tune"):
                yield recipe_case(f"{_name(key)}={value}", text, command, contains=hint)
    # [relabel] has a default for every key and may be left out (docs/recipe.md): not an error
    for table in ("logs", "goal", "reward", "output"):
        yield recipe_case(f"no-[{table}]", recipe(drop_tables=(table,)), contains=table)
    for key in [("logs", "path"), ("output", "path"), ("reward", "threshold")]:
        yield recipe_case(f"no-{_name(key)}", recipe(drop=(key,)), contains=key[1])
    yield recipe_case("relabel.weights-all-zero", recipe({("relabel.weights", k): "0"
                                                          for k in ("original", "future", "geometric")}))
    yield recipe_case("unknown-top-key", recipe(extra="colour = 1\n"), contains="colour")
    yield recipe_case("unknown-reward-key", recipe().replace("threshold = 0.04", "threshold = 0.04\ntreshold = 1"),
                      contains="treshold")
    yield recipe_case("unknown-strategy", recipe().replace("future = 2", "fture = 2"), contains="fture")
    yield recipe_case("unknown-table", recipe(extra="\n[extra]\nx = 1\n"), contains="extra")
    yield recipe_case("goal-fields-and-indices", recipe().replace('dtype = "float32"', 'dtype = "float32"\nindices = [0]'))
    yield recipe_case("goal-indices-out-of-range", recipe().replace('fields = ["head", "trays"]', "indices = [999]"))
    yield recipe_case("goal-indices-negative", recipe().replace('fields = ["head", "trays"]', "indices = [-1]"))
    yield recipe_case("goal-embedding-missing", recipe().replace('fields = ["head", "trays"]',
                                                                'embedding = "{dir}/missing.npz"'))
    yield recipe_case("goal-embedding-folder", recipe().replace('fields = ["head", "trays"]', 'embedding = "{dir}/folder"'))
    yield recipe_case("goal-embedding-garbage", recipe().replace('fields = ["head", "trays"]',
                                                                'embedding = "{dir}/garbage.npz"'))
    yield recipe_case("goal-embedding-device", recipe().replace('fields = ["head", "trays"]', 'embedding = "/dev/zero"'))
    yield recipe_case("box-wrong-length", recipe({("reward", "distance"): '"box"', ("reward", "threshold"): "[0.1, 0.2]"}))
    for label, text in BAD_TOML.items():
        yield recipe_case(f"toml-{label}", text)
        yield Case(f"layout-toml-{label}", ("scan", "{base}/gantry-logs.h5", "--layout", "{dir}/layout.toml"),
                   files={"layout.toml": text})
    for label, path in (("missing", "{dir}/nope.toml"), ("folder", "{dir}/folder"), ("dev-null", "/dev/null"),
                        ("dev-zero", "/dev/zero"), ("dev-urandom", "/dev/urandom")):
        sub = path.startswith("/dev/")
        yield Case(f"build:recipe-is-{label}", ("build", path), files=dict(PROPS), subprocess=sub, seconds=60.0)
        yield Case(f"tune:recipe-is-{label}", ("tune", path), files=dict(PROPS), subprocess=sub, seconds=60.0)


#: Texts that are not valid TOML (or not text).
BAD_TOML = {
    "unclosed-table": "version = 1\n[logs\npath = 'x'\n",
    "duplicate-key": "version = 1\nversion = 1\n",
    "no-value": "version =\n",
    "binary": bytes(range(256)),
    "utf16": "version = 1\n".encode("utf-16"),
    "empty": "",
    "braces": "version = {\n",
}

# ---- the layout ----------------------------------------------------------------------------------
LAYOUT = [
    (None, "version", "1"), (None, "shape", '"grouped"'), (None, "episode_groups", '"bench/*"'),
    ("keys", "action", '"action"'), ("keys", "reward", '"reward"'), ("keys", "success", '"success"'),
    ("keys", "task", '"task"'), ("keys", "task_goal", '"task_goal"'),
    ("fields", "head", '"head"'), ("fields", "head_velocity", '"head_velocity"'), ("fields", "trays", '"trays"'),
]

LAYOUT_BAD = {
    (None, "version"): ["2", '"x"'],
    (None, "shape"): ['"bogus"', "3", '"flat"'],
    (None, "episode_groups"): ['"nope/*"', '""', "5"],
    ("keys", "action"): ['"nope"', "5", '"head"'],
    ("keys", "reward"): ['"nope"', '"head"'],
    ("keys", "success"): ['"nope"', '"trays"'],
    ("keys", "task_goal"): ['"nope"', "1"],
    ("fields", "head"): ['"nope"', '"action"', "[1]", '""'],
}


def layout(changes=None, drop=(), drop_tables=(), extra="") -> str:
    changes = changes or {}
    entries = [(t, k, changes.get((t, k), v)) for t, k, v in LAYOUT if (t, k) not in drop and t not in drop_tables]
    return render(entries) + extra


def layout_cases():
    def three(name, text, contains=None):
        yield Case(f"scan:layout-{name}", ("scan", "{base}/gantry-logs.h5", "--layout", "{dir}/layout.toml"),
                   files={"layout.toml": text}, contains=contains)
        yield Case(f"embed:layout-{name}", ("embed", "{base}/gantry-logs.h5", "--layout", "{dir}/layout.toml",
                                            "--method", "raw", "-o", "{dir}/e.npz"), files={"layout.toml": text},
                   contains=contains)
        yield Case(f"build:layout-{name}", ("build", "{dir}/recipe.toml"),
                   files={"recipe.toml": recipe({("logs", "layout"): '"{dir}/layout.toml"'}), "layout.toml": text},
                   contains=contains)

    for key, values in LAYOUT_BAD.items():
        for value in values:
            yield from three(f"{_name(key)}={value}", layout({key: value}))
    yield from three("no-[keys]", layout(drop_tables=("keys",)))
    yield from three("no-[fields]", layout(drop_tables=("fields",)))
    yield from three("unknown-top-key", layout(extra="colour = 1\n"), contains="colour")
    yield from three("unknown-role", layout().replace('task = "task"', 'task = "task"\nbogus = "x"'), contains="bogus")
    for label, path in (("missing", "{dir}/nope.toml"), ("folder", "{dir}/folder"), ("dev-zero", "/dev/zero")):
        yield Case(f"scan:layout-is-{label}", ("scan", "{base}/gantry-logs.h5", "--layout", path),
                   files=dict(PROPS), subprocess=path.startswith("/dev/"), seconds=60.0)


# ---- options -------------------------------------------------------------------------------------
def option_cases():
    r = ("{base}/gantry-recipe.toml",)
    logs = "{base}/gantry-logs.h5"
    cases = {
        "build": [["--chunk-rows", "5"], ["--chunk-rows", "x"], ["--workers", "-1"], ["--seed", "-1"],
                  ["--seed", "x"], ["--out", "{dir}/folder"], ["--workers", "1", "--scheduler", "tcp://127.0.0.1:1"],
                  ["--bogus"], ["--out", "{dir}/no-such-folder/out.h5"]],
        "tune": [["--chooser", "bogus"], ["--chooser", "target-precision", "--target-precision", "2"],
                 ["--chooser", "target-precision", "--target-precision", "nan"], ["--resamples", "-5"],
                 ["--max-transitions", "0"], ["--distance", "bogus"], ["--labels", "{dir}/missing.npz"],
                 ["--labels", "{dir}/folder"], ["--labels", "{dir}/garbage.npz"], ["--write-recipe", "{dir}/t.toml"],
                 ["--from-success", "--plots", "{dir}/text.h5"], ["--labels", "{dir}/text.h5"]],
    }
    for command, variants in cases.items():
        for opts in variants:
            yield Case(f"{command}:option {' '.join(opts)}", (command, *r, *opts), files=dict(PROPS))
    for opts in (["--method", "bogus"], ["--method", "pca", "--dims", "0"], ["--method", "raw", "--dims", "2"],
                 ["--method", "pca", "--degree", "2"], ["--method", "precomputed"],
                 ["--method", "precomputed", "--values", "{dir}/garbage.npz"], ["--method", "raw", "--block", "0"],
 ["--method", "raw", "--input", "frame"],
                 ["--method", "raw", "--chunk-steps", "0"]):
        yield Case(f"embed:option {' '.join(opts)}", ("embed", logs, "--layout", "{base}/gantry-layout.toml", *opts,
                                                      "-o", "{dir}/e.npz"), files=dict(PROPS))
    yield Case("embed:option --fields nope", ("embed", logs, "--layout", "{base}/gantry-layout.toml", "--method", "raw",
                                              "--fields", "nope", "-o", "{dir}/e.npz"), contains="key --fields: goal field 'nope'")
    yield Case("embed:output-is-folder", ("embed", logs, "--method", "raw", "-o", "{dir}/folder"), files=dict(PROPS))
    yield Case("embed:values-device", ("embed", logs, "--method", "precomputed", "--values", "/dev/zero",
                                       "-o", "{dir}/e.npz"), subprocess=True, seconds=60.0)
    for opts, files in ((["{dir}/missing.h5"], {}), (["{dir}/folder"], {"folder": FOLDER}),
                        (["{dir}/text.h5"], PROPS), (["{dir}/empty.h5"], PROPS), ([logs, "--chunk", "0"], {})):
        yield Case(f"scan:{' '.join(opts)}", ("scan", *opts), files=dict(files))
    for dev in ("/dev/null", "/dev/zero"):
        yield Case(f"scan:{dev}", ("scan", dev), subprocess=True, seconds=60.0)
    yield Case("demo:--episodes 0", ("demo", "{dir}/d", "--episodes", "0"))
    yield Case("demo:--seed -1", ("demo", "{dir}/d", "--seed", "-1"))
    yield Case("demo:dir-is-a-file", ("demo", "{dir}/text.h5", "--episodes", "2"), files=dict(PROPS))
    yield Case("unknown-command", ("bogus",))


# ---- sets for verify -----------------------------------------------------------------------------
def _h5_bytes(make):
    """A function of the shared folder returning the bytes of an HDF5 file written by ``make(f, base)``."""
    def build(base):
        import io

        import h5py

        buf = io.BytesIO()
        with h5py.File(buf, "w") as f:
            make(f, base)
        return buf.getvalue()
    return build


def _set_with(attrs):
    """The shared set's bytes with root attributes changed."""
    def build(base):
        import shutil
        import tempfile
        from pathlib import Path

        import h5py

        with tempfile.TemporaryDirectory() as tmp:
            p = Path(tmp) / "s.h5"
            shutil.copy(base / "set.h5", p)
            with h5py.File(p, "r+") as f:
                for k, v in attrs.items():
                    if v is None:
                        del f.attrs[k]
                    else:
                        f.attrs[k] = v
            return p.read_bytes()
    return build


def _truncated(fraction):
    def build(base):
        data = (base / "set.h5").read_bytes()
        return data[: int(len(data) * fraction)]
    return build


def verify_cases():
    files = {
        "empty": b"", "text": b"a text file, not HDF5\n", "garbage": bytes(range(256)) * 64,
        "hdf5-no-format": _h5_bytes(lambda f, b: f.create_dataset("x", data=[1, 2, 3])),
        "hdf5-other-format": _h5_bytes(lambda f, b: f.attrs.__setitem__("format", "something-else")),
        "set-format-renamed": _set_with({"format": "another-format"}),
        "set-format-missing": _set_with({"format": None}),
        "set-version-99": _set_with({"format_version": 99}),
        "set-version-text": _set_with({"format_version": "one"}),
        "set-truncated-half": _truncated(0.5),
        "set-truncated-head": _truncated(0.01),
    }
    for label, content in files.items():
        yield Case(f"verify:{label}", ("verify", "{dir}/set.h5"), files={"set.h5": content})
    yield Case("verify:missing", ("verify", "{dir}/nope.h5"))
    yield Case("verify:folder", ("verify", "{dir}/folder"), files={"folder": FOLDER})
    for dev in ("/dev/null", "/dev/zero"):
        yield Case(f"verify:{dev}", ("verify", dev), subprocess=True, seconds=60.0)


# ---- seeded random families ----------------------------------------------------------------------
def random_cases(seed: int, n: int):
    """``n`` seeded cases: two or three bad values at once, and recipes cut short before [output]."""
    rng = random.Random(seed)
    keys = sorted(RECIPE_BAD, key=lambda k: (str(k[0]), k[1]))
    for i in range(n):
        picked = rng.sample(keys, rng.choice((2, 3)))
        changes = {k: rng.choice(RECIPE_BAD[k]) for k in picked}
        text = recipe(changes)
        yield recipe_case(f"combo-{i}:" + ",".join(f"{_name(k)}={v}" for k, v in changes.items()), text)
    base = recipe()
    cut_before = base.index("[output]")
    for i in range(n // 2):
        cut = rng.randrange(0, cut_before)
        yield recipe_case(f"cut-{i}:at-byte-{cut}", base[:cut])


def generate(seed: int = 0) -> list[Case]:
    """The whole corpus (deterministic for a seed); names are unique."""
    cases = [*recipe_cases(), *layout_cases(), *option_cases(), *verify_cases(), *random_cases(seed, 120)]
    names = [c.name for c in cases]
    dupes = {n for n in names if names.count(n) > 1}
    assert not dupes, dupes
    return cases


def quick(seed: int = 0, size: int = 70) -> list[Case]:
    """A seeded sample of :func:`generate` with at least one case of every family, for the default run."""
    cases = generate(seed)
    rng = random.Random(seed)
    families: dict = {}
    for c in cases:
        command, _, rest = c.name.partition(":")
        family = rest.split("=")[0].split(" ")[0].split("-")[0].split(".")[0] if rest else ""
        families.setdefault(f"{command}:{family}", []).append(c)
    chosen = {rng.choice(group).name for group in families.values()}
    rest = [c.name for c in cases if c.name not in chosen]
    chosen |= set(rng.sample(rest, max(0, min(len(rest), size - len(chosen)))))
    return [c for c in cases if c.name in chosen]
