"""Relocatable sets: a set finds its logs after they move, by place and by checksum, and refuses
a file whose checksum differs. The set itself is never modified.

Checksums are checked against Python's hashlib SHA-256 (FIPS 180-4), computed here independently
of goalkit's own digest function.
"""

import hashlib
import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import h5py
import numpy as np
import pytest
from click.testing import CliRunner
from hypothesis import given, settings, strategies as st

import goalkit
from goalkit.cli import main
from goalkit.demo import make_demo
from goalkit.errors import DatasetError
from goalkit.write.relocate import locate
from tamper_cases import reseal


def sha256(path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def listing(folder) -> dict:
    """Every file under ``folder`` with its SHA-256 (to show nothing was written or changed)."""
    return {str(p.relative_to(folder)): sha256(p) for p in sorted(Path(folder).rglob("*")) if p.is_file()}


def build_apart(root: Path, mode: str = "indexed", episodes: int = 8) -> Path:
    """The demo's logs in ``root/logs``, its set in ``root/sets/goals.h5``; returns the set."""
    make_demo(root / "logs", episodes=episodes, seed=3)
    recipe_file = root / "logs" / "gantry-recipe.toml"
    text = recipe_file.read_text().replace('mode = "materialised"', f'mode = "{mode}"')
    recipe_file.write_text(text.replace('path = "gantry-goals.h5"', 'path = "../sets/goals.h5"'))
    (root / "sets").mkdir()
    goalkit.build(goalkit.load_recipe(recipe_file), card=False)
    return root / "sets" / "goals.h5"


def read_first(path, **kw):
    with goalkit.open_set(path, **kw) as gs:
        return gs.read("train", start=0, stop=40)


def one_line_error(res):
    lines = res.output.strip().splitlines() if res.stderr is None else res.stderr.strip().splitlines()
    assert res.exit_code == 2, res.output
    assert len(lines) == 1 and "Traceback" not in res.output, res.output
    return lines[0]


def test_provenance_records_relative_paths_sizes_and_checksums(tmp_path):
    path = build_apart(tmp_path)
    with goalkit.open_set(path) as gs:
        prov = gs.provenance
    assert prov["set_folder"] == os.path.realpath(tmp_path / "sets")
    [entry] = prov["log_files"]
    log = tmp_path / "logs" / "gantry-logs.h5"
    assert entry["path"] == os.path.realpath(log)
    assert entry["relative"] == os.path.join("..", "logs", "gantry-logs.h5")
    assert entry["bytes"] == log.stat().st_size
    assert entry["sha256"] == sha256(log)      # hashlib, independently of goalkit.write.provenance
    report = goalkit.verify(path, audit=False)
    assert report.ok, report.failures
    assert "moved_files" not in report.checked


def test_the_bytes_do_not_depend_on_where_the_set_is_written(tmp_path):
    # relative paths are taken against the recipe's own [output] folder, not --out
    path = build_apart(tmp_path)
    (tmp_path / "other").mkdir()
    elsewhere = tmp_path / "other" / "goals.h5"
    recipe = goalkit.load_recipe(tmp_path / "logs" / "gantry-recipe.toml").with_overrides(out=elsewhere)
    goalkit.build(recipe, card=False)
    assert sha256(elsewhere) == sha256(path)


def test_set_and_logs_moved_together_need_no_option(tmp_path):
    path = build_apart(tmp_path / "old")
    before = read_first(path)
    stored = sha256(path)
    shutil.move(tmp_path / "old", tmp_path / "new")    # the whole folder, as copied to another machine
    moved = tmp_path / "new" / "sets" / "goals.h5"
    report = goalkit.verify(moved)
    assert report.ok, report.failures
    assert report.checked["moved_files"] == {
        os.path.realpath(tmp_path / "old" / "logs" / name): os.path.realpath(tmp_path / "new" / "logs" / name)
        for name in ("gantry-logs.h5", "gantry-layout.toml")}
    after = read_first(moved)                          # indexed reads resolve from the moved logs
    assert set(after) == set(before)
    for name in before:
        np.testing.assert_array_equal(after[name], before[name])
    assert sha256(moved) == stored                     # the set is never rewritten
    res = CliRunner().invoke(main, ["verify", str(moved)])
    assert res.exit_code == 0 and res.output.startswith(f"consistent: {moved}"), res.output


def test_moved_logs_need_the_new_root(tmp_path):
    path = build_apart(tmp_path)
    before = read_first(path)
    stored = sha256(path)
    archive = tmp_path / "archive" / "2026"
    archive.parent.mkdir()
    shutil.move(tmp_path / "logs", archive)
    recorded = os.path.realpath(tmp_path / "logs" / "gantry-logs.h5")
    # without the option: one line naming the recorded file, where it looked, and the option
    with pytest.raises(DatasetError) as exc:
        goalkit.verify(path)
    text = str(exc.value)
    assert f"cannot find the log file {recorded} (looked at {recorded})" in text and "--logs-root" in text
    res = CliRunner().invoke(main, ["verify", str(path), "--quiet"])
    line = one_line_error(res)
    assert line.startswith(f"goalkit: error: {path}: key provenance.log_files[0]: cannot find the log file")
    with pytest.raises(DatasetError, match="cannot find the log file"):
        read_first(path)
    # with it: verify, the audit and indexed reads all use the moved logs
    report = goalkit.verify(path, logs_root=archive)
    assert report.ok, report.failures
    assert report.checked["moved_files"][recorded] == str(archive / "gantry-logs.h5")
    after = read_first(path, logs_root=archive)
    for name in before:
        np.testing.assert_array_equal(after[name], before[name])
    res = CliRunner().invoke(main, ["verify", str(path), "--logs-root", str(archive), "--json"])
    assert res.exit_code == 0, res.output
    assert json.loads(res.output)["ok"] is True
    res = CliRunner().invoke(main, ["verify", str(path), "--sample", "200", "--logs-root", str(archive), "--quiet"])
    assert res.exit_code == 0, res.output
    assert sha256(path) == stored


def test_a_renamed_file_is_found_by_its_checksum(tmp_path):
    path = build_apart(tmp_path)
    root = tmp_path / "elsewhere"
    (root / "deep" / "er").mkdir(parents=True)
    log = tmp_path / "logs" / "gantry-logs.h5"
    # decoys of the same size but other bytes come first in the search, and are passed over
    data = log.read_bytes()
    (root / "deep" / "a-decoy.h5").write_bytes(data[:-1] + bytes([data[-1] ^ 1]))
    shutil.move(log, root / "deep" / "er" / "day-3.h5")
    shutil.move(tmp_path / "logs" / "gantry-layout.toml", root / "layout-renamed.toml")
    shutil.rmtree(tmp_path / "logs")
    report = goalkit.verify(path, logs_root=root, audit=False)
    assert report.ok, report.failures
    found = report.checked["moved_files"]
    assert found[os.path.realpath(log)] == str(root / "deep" / "er" / "day-3.h5")
    assert found[os.path.realpath(tmp_path / "logs" / "gantry-layout.toml")] == str(root / "layout-renamed.toml")
    with goalkit.open_set(path, logs_root=root) as gs:
        assert sorted(map(str, gs.source_files())) == sorted(found.values())
        assert gs.read("train", start=0, stop=5)["observation"].shape == (5, 9)


def test_a_file_with_the_same_name_and_other_bytes_is_refused(tmp_path):
    path = build_apart(tmp_path)
    root = tmp_path / "moved"
    shutil.move(tmp_path / "logs", root)
    with h5py.File(root / "gantry-logs.h5", "r+") as f:   # same name, changed bytes
        f.attrs["touched"] = 1
    recorded = os.path.realpath(tmp_path / "logs" / "gantry-logs.h5")
    with goalkit.open_set(path) as gs:
        want = gs.provenance["log_files"][0]["sha256"]
    now = sha256(root / "gantry-logs.h5")
    before = listing(tmp_path)
    res = CliRunner().invoke(main, ["verify", str(path), "--logs-root", str(root)])
    line = one_line_error(res)
    assert line == (f"goalkit: error: {path}: key provenance.log_files[0]: refusing {root / 'gantry-logs.h5'}: it is "
                    f"not the log file {recorded} this set was built from (checksum {now[:12]}..., recorded "
                    f"{want[:12]}...)")
    with pytest.raises(DatasetError, match="refusing"):
        read_first(path, logs_root=root)
    assert listing(tmp_path) == before                  # nothing written, nothing changed


def test_a_changed_file_in_place_is_still_a_verify_failure(tmp_path):
    path = build_apart(tmp_path)
    with h5py.File(tmp_path / "logs" / "gantry-logs.h5", "r+") as f:
        f.attrs["touched"] = 1
    log = tmp_path / "logs" / "gantry-logs.h5"
    with goalkit.open_set(path) as gs:
        want = gs.provenance["log_files"][0]["sha256"]
    report = goalkit.verify(path, audit=False)
    assert not report.ok
    assert report.failures[0] == (f"source file {os.path.realpath(log)}: changed since the build (checksum "
                                  f"{sha256(log)[:12]}..., recorded {want[:12]}...)")
    with pytest.raises(DatasetError, match="is not the file this set was built from"):
        read_first(path)


def test_links_under_the_root_are_not_followed_outside_it(tmp_path):
    path = build_apart(tmp_path)
    outside = tmp_path / "outside"
    shutil.move(tmp_path / "logs", outside)
    root = tmp_path / "root"
    root.mkdir()
    os.symlink(outside / "gantry-logs.h5", root / "gantry-logs.h5")   # a planted link at the file's place
    os.symlink(outside, root / "linked-folder")                       # and a linked folder
    with pytest.raises(DatasetError, match="cannot find the log file"):
        goalkit.verify(path, logs_root=root, audit=False)
    # a link that stays inside the root is an ordinary input
    inside = root / "real"
    inside.mkdir()
    shutil.copy(outside / "gantry-logs.h5", inside / "gantry-logs.h5")
    shutil.copy(outside / "gantry-layout.toml", inside / "gantry-layout.toml")
    (root / "gantry-logs.h5").unlink()
    os.symlink(inside / "gantry-logs.h5", root / "gantry-logs.h5")
    report = goalkit.verify(path, logs_root=root, audit=False)
    assert report.ok, report.failures


def test_materialised_sets_read_without_their_logs(tmp_path):
    path = build_apart(tmp_path, mode="materialised")
    shutil.rmtree(tmp_path / "logs")
    assert read_first(path)["observation"].shape == (40, 9)   # nothing to resolve: logs never looked for


def test_suite_and_batches_take_the_new_root(tmp_path):
    path = build_apart(tmp_path, episodes=30)
    root = tmp_path / "moved"
    shutil.move(tmp_path / "logs", root)
    out = tmp_path / "suite.h5"
    res = CliRunner().invoke(main, ["suite", str(path), "--out", str(out), "--per-cell", "5", "--quiet"])
    assert "cannot find the log file" in one_line_error(res)
    assert not out.exists()
    res = CliRunner().invoke(main, ["suite", str(path), "--out", str(out), "--per-cell", "5", "--quiet",
                                    "--logs-root", str(root)])
    assert res.exit_code == 0, res.output
    assert len(goalkit.read_suite(out)) > 0
    batches = goalkit.NumpyBatches(path, batch_size=16, shuffle=False, logs_root=root, dtypes={})
    first = next(iter(batches))
    np.testing.assert_array_equal(first["observation"], read_first(path, logs_root=root)["observation"][:16])


def test_help_shows_the_option_and_its_default():
    for command in ("verify", "suite"):
        res = CliRunner().invoke(main, [command, "--help"])
        text = " ".join(res.output.split())
        assert "--logs-root FOLDER" in text and "[default: (none: beside the set, then the recorded paths)]" in text


def test_a_real_process_verifies_moved_logs(tmp_path):
    path = build_apart(tmp_path)
    root = tmp_path / "moved"
    shutil.move(tmp_path / "logs", root)
    exe = str(Path(sys.executable).with_name("goalkit"))
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parents[2]))
    res = subprocess.run([exe, "verify", str(path), "--logs-root", str(root)], capture_output=True, text=True,
                         timeout=300, env=env)
    assert res.returncode == 0, res.stderr
    assert res.stdout.startswith(f"consistent: {path}")
    res = subprocess.run([exe, "verify", str(path)], capture_output=True, text=True, timeout=300, env=env)
    assert res.returncode == 2 and len(res.stderr.strip().splitlines()) == 1, res.stderr
    assert "--logs-root FOLDER" in res.stderr


# ---- the search rule, on plain files ------------------------------------------------------------
names = st.lists(st.sampled_from(["a", "b", "day-1", "x.h5", "y.npz"]), min_size=1, max_size=3)


@settings(max_examples=30, deadline=None)
@given(files=st.lists(st.tuples(names, st.binary(min_size=1, max_size=24)), min_size=1, max_size=5,
                      unique_by=lambda t: tuple(t[0])),
       rename=st.lists(st.booleans(), min_size=5, max_size=5))
def test_every_moved_file_is_found_at_its_place_or_by_checksum(tmp_path_factory, files, rename):
    """Files under a base folder moved to a new root, some renamed: each is found, and is the right one."""
    top = tmp_path_factory.mktemp("search")
    base, root = top / "base", top / "root"
    entries, contents = [], {}
    for i, (parts, data) in enumerate(files):
        data = data + bytes([i])                   # distinct contents
        rel = Path(*parts[:-1], f"{i}-{parts[-1]}")
        recorded = base / rel
        new = root / (rel if not rename[i] else Path(f"renamed-{i}.bin"))
        new.parent.mkdir(parents=True, exist_ok=True)
        new.write_bytes(data)
        entries.append({"path": str(recorded), "bytes": len(data), "sha256": hashlib.sha256(data).hexdigest()})
        contents[str(recorded)] = data
    prov = {"log_files": entries, "embedding_files": [], "layout_text": ""}
    found = locate(top / "set.h5", prov, logs_root=root).found
    assert set(found) == set(contents)
    for recorded, path in found.items():
        assert Path(path).read_bytes() == contents[recorded]
        assert Path(path).resolve().is_relative_to(root.resolve())


# ---- several sources in several folders -------------------------------------------------------
LAYOUT = 'version = 1\nshape = "flat"\n[keys]\nobservation = "obs"\naction = "act"\n[boundaries]\nepisode_id = "ids"\n'
RECIPE = """version = 1
seed = 5
[[sources]]
name = "teleop"
path = "../logs/teleop/*.h5"
layout = "../logs/layout.toml"
[[sources]]
name = "scripted"
path = ["../logs/scripted/bench-a.npz"]
layout = "../logs/layout.toml"
[goal]
indices = [0, 1]
[relabel.weights]
future = 2
final = 1
[reward]
threshold = 0.4
[split]
validation = 0.3
[output]
path = "../sets/goals.h5"
mode = "indexed"
"""


def write_flat(path, seed, n):
    """Invented flat logs (the convention of tests/pipeline/test_sources.py)."""
    r = np.random.default_rng(seed)
    eps = [(r.normal(size=(t + 1, 3)), r.normal(size=(t, 2))) for t in r.integers(2, 9, n)]
    obs = np.concatenate([o for o, _ in eps])
    act = np.concatenate([a for _, a in eps])
    ids = np.repeat(np.arange(n), [len(a) for _, a in eps])
    if str(path).endswith(".npz"):
        np.savez(path, obs=obs, act=act, ids=ids)
    else:
        with h5py.File(path, "w") as f:
            f["obs"], f["act"], f["ids"] = obs, act, ids


def test_several_sources_in_several_folders_move_under_one_root(tmp_path):
    logs = tmp_path / "logs"
    (logs / "teleop").mkdir(parents=True)
    (logs / "scripted").mkdir()
    (tmp_path / "recipes").mkdir()
    (tmp_path / "sets").mkdir()
    write_flat(logs / "teleop" / "day-1.h5", 1, 4)
    write_flat(logs / "teleop" / "day-2.h5", 2, 3)
    write_flat(logs / "scripted" / "bench-a.npz", 3, 5)
    (logs / "layout.toml").write_text(LAYOUT)
    (tmp_path / "recipes" / "r.toml").write_text(RECIPE)
    path = goalkit.build(goalkit.load_recipe(tmp_path / "recipes" / "r.toml"), card=False).path
    before = read_first(path)
    assert goalkit.verify(path, audit=False).ok
    root = tmp_path / "nas" / "archive"
    root.parent.mkdir()
    shutil.move(logs, root)
    shutil.move(root / "teleop" / "day-2.h5", root / "teleop" / "renamed.h5")   # found by checksum
    with pytest.raises(DatasetError, match="cannot find the log file"):
        read_first(path)
    report = goalkit.verify(path, logs_root=root)
    assert report.ok, report.failures
    assert len(report.checked["moved_files"]) == 3
    after = read_first(path, logs_root=root)
    for name in before:
        np.testing.assert_array_equal(after[name], before[name])


def test_an_embedding_moves_with_the_logs(tmp_path):
    logs = tmp_path / "logs"
    make_demo(logs, episodes=10, seed=4)
    source = goalkit.open_logs(logs / "gantry-logs.h5", goalkit.load_layout(logs / "gantry-layout.toml"))
    goalkit.fit_on_logs(source, goalkit.SFA(n_components=3)).save(logs / "emb.npz")
    text = (logs / "gantry-recipe.toml").read_text()
    text = text.replace('fields = ["head", "trays"]', 'embedding = "emb.npz"').replace("original = 1", "original = 0")
    text = text.replace('mode = "materialised"', 'mode = "indexed"').replace('"gantry-goals.h5"', '"../sets/emb.h5"')
    (logs / "emb-recipe.toml").write_text(text)
    (tmp_path / "sets").mkdir()
    path = goalkit.build(goalkit.load_recipe(logs / "emb-recipe.toml"), card=False).path
    before = read_first(path)
    with goalkit.open_set(path) as gs:
        assert gs.provenance["embedding_files"][0]["relative"] == os.path.join("..", "logs", "emb.npz")
    root = tmp_path / "moved"
    shutil.move(logs, root)
    with pytest.raises(DatasetError, match="cannot find the log file"):
        goalkit.verify(path)
    report = goalkit.verify(path, logs_root=root)
    assert report.ok, report.failures
    assert report.checked["moved_files"][os.path.realpath(logs / "emb.npz")] == str(root / "emb.npz")
    after = read_first(path, logs_root=root)
    np.testing.assert_array_equal(after["reached_goal"], before["reached_goal"])   # phi from the moved embedding


def test_info_shows_each_log_files_relative_path(tmp_path):
    path = build_apart(tmp_path)
    res = CliRunner().invoke(main, ["info", str(path)])
    assert res.exit_code == 0, res.output
    log = os.path.realpath(tmp_path / "logs" / "gantry-logs.h5")
    line = next(x for x in res.output.splitlines() if x.strip().startswith(log))
    assert line.endswith(f"(from the set's folder: {os.path.join('..', 'logs', 'gantry-logs.h5')})")


def test_a_folder_of_episode_files_moves_as_a_folder(tmp_path):
    # Invented gantry episodes, one NPZ file each; the recipe names the folder.
    rng = np.random.default_rng(0)
    per = tmp_path / "logs" / "episodes"
    per.mkdir(parents=True)
    for i, n in enumerate([5, 7, 9, 11, 6, 8]):
        np.savez(per / f"ep{i}.npz", obs=rng.normal(size=(n + 1, 4)).astype(np.float32),
                 act=rng.normal(size=(n, 2)).astype(np.float32))
    (tmp_path / "logs" / "layout.toml").write_text('version = 1\nshape = "per-file"\nfile_pattern = "*.npz"\n'
                                                   '[keys]\nobservation = "obs"\naction = "act"\n')
    (tmp_path / "logs" / "recipe.toml").write_text(
        'version = 1\nseed = 0\n[logs]\npath = "episodes"\nlayout = "layout.toml"\n[goal]\nindices = [0, 1]\n'
        '[relabel]\ngoals_per_transition = 2\n[relabel.weights]\nfuture = 1\nfinal = 1\n'
        '[reward]\nthreshold = 0.5\n[split]\nvalidation = 0.3\n[output]\npath = "../set.h5"\nmode = "indexed"\n')
    path = goalkit.build(goalkit.load_recipe(tmp_path / "logs" / "recipe.toml"), card=False).path
    before = read_first(path)
    root = tmp_path / "moved"
    shutil.move(tmp_path / "logs", root)
    report = goalkit.verify(path, logs_root=root)
    assert report.ok, report.failures
    after = read_first(path, logs_root=root)
    for name in before:
        np.testing.assert_array_equal(after[name], before[name])
    # one episode file renamed into another folder: found by checksum, but the folder the recipe
    # names can no longer be placed; refused in one line
    (root / "other").mkdir()
    shutil.move(root / "episodes" / "ep3.npz", root / "other" / "renamed.npz")
    with pytest.raises(DatasetError, match="were found in different folders"):
        goalkit.verify(path, logs_root=root)


def test_a_root_that_is_not_a_folder_is_one_line(tmp_path):
    path = build_apart(tmp_path)
    shutil.move(tmp_path / "logs", tmp_path / "moved")
    missing = tmp_path / "nowhere"
    res = CliRunner().invoke(main, ["verify", str(path), "--logs-root", str(missing)])
    assert one_line_error(res) == (f"goalkit: error: {missing}: key --logs-root: expected a folder holding the "
                                   f"moved logs")


def test_a_set_built_before_relative_paths_finds_moved_logs_under_the_root(tmp_path):
    path = build_apart(tmp_path)
    with h5py.File(path, "r+") as f:                 # as an earlier goalkit wrote it
        prov = json.loads(f.attrs["provenance"])
        del prov["set_folder"]
        for entry in prov["log_files"]:
            del entry["relative"]
        f.attrs["provenance"] = json.dumps(prov, sort_keys=True)
    reseal(path)
    assert goalkit.verify(path, audit=False).ok
    shutil.move(tmp_path / "logs", tmp_path / "moved")
    with pytest.raises(DatasetError, match="cannot find the log file"):
        goalkit.verify(path, audit=False)
    report = goalkit.verify(path, logs_root=tmp_path / "moved")
    assert report.ok, report.failures
