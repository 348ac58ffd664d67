"""Logs that keep growing: rebuilding with keep_work reuses the rows of unchanged episodes.

The reference for every check is a fresh build of the same recipe at the same path (the set's
provenance names both), compared by SHA-256 of the whole file (FIPS 180-4, via hashlib).
"""

from __future__ import annotations

import hashlib
import json
import os
import resource
import signal
import subprocess
import sys
from pathlib import Path

import h5py
import numpy as np
import pytest
from click.testing import CliRunner
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from goalkit import DaskCluster, LocalWorkers, build, load_recipe
from goalkit.cli import main as cli_main

LAYOUT = 'version = 1\nshape = "flat"\n[keys]\nobservation = "obs"\naction = "act"\n[boundaries]\nepisode_id = "ids"\n'
TAIL = """
[goal]
indices = [0, 1]
[relabel]
goals_per_transition = 3
[relabel.weights]
future = 2
final = 1
geometric = 1
{extra}
[reward]
threshold = {threshold}
[split]
validation = {validation}
[output]
path = "set.h5"
mode = "materialised"
"""
SOURCES = ("teleop", "scripted", "policy")


def episodes(seed, n, width=3):
    r = np.random.default_rng(seed)
    lengths = r.integers(1, 9, n)
    return [(r.normal(size=(t + 1, width)), r.normal(size=(t, 2))) for t in lengths]


def write(path, eps):
    obs = np.concatenate([o for o, _ in eps])
    act = np.concatenate([a for _, a in eps])
    ids = np.repeat(np.arange(len(eps)), [len(a) for _, a in eps])
    if str(path).endswith(".npz"):
        np.savez(path, obs=obs, act=act, ids=ids)
    else:
        with h5py.File(path, "w") as f:
            f["obs"], f["act"], f["ids"] = obs, act, ids


def recipe(d: Path, threshold=0.4, extra="", validation=0.3) -> Path:
    """Three named sources, each a glob of its files."""
    (d / "layout.toml").write_text(LAYOUT)
    logs = "".join(f'[[sources]]\nname = "{n}"\npath = "{n}-*"\nlayout = "layout.toml"\n' for n in SOURCES)
    p = d / "recipe.toml"
    p.write_text("version = 1\nseed = 5\n" + logs + TAIL.format(threshold=threshold, extra=extra, validation=validation))
    return p


def archive(d: Path) -> int:
    """teleop: two files, scripted and policy: one each (HDF5 and NPZ); returns the episodes."""
    write(d / "teleop-day1.h5", episodes(2, 6))
    write(d / "teleop-day2.npz", episodes(3, 4))
    write(d / "scripted-day1.npz", episodes(4, 7))
    write(d / "policy-day1.h5", episodes(5, 5))
    return 22


def sha(path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def fresh_sha(rec: Path) -> str:
    """SHA-256 of a fresh build (no work folder used) at the same output path."""
    return sha(build(rec, replace=True, card=False).path)


def test_appended_file_reuses_old_episodes_byte_identical(tmp_path):
    total = archive(tmp_path)
    rec = recipe(tmp_path)
    first = build(rec, keep_work=True, card=False)
    assert first.reuse["episodes"] == {"reused": 0, "new": total}
    assert first.reuse["reason"] is None
    folder = tmp_path / ".set.h5.work"
    assert first.reuse["files"] == 4 == len(list(folder.glob("unit-*.npz")))      # one unit per file here
    assert first.reuse["bytes"] == sum(p.stat().st_size for p in folder.glob("unit-*.npz")) > 0
    write(tmp_path / "teleop-day3.h5", episodes(6, 5))      # a fourth file, after teleop's others
    again = build(rec, keep_work=True, replace=True, card=False, max_rows_per_chunk=1000)
    assert again.reuse["episodes"] == {"reused": total, "new": 5}
    assert again.reuse["units"] == {"reused": 4, "computed": 1}
    grown = sha(again.path)
    assert grown == fresh_sha(rec)
    # unchanged logs: everything reused, same bytes again
    third = build(rec, keep_work=True, replace=True, card=False)
    assert third.reuse["episodes"] == {"reused": total + 5, "new": 0}
    assert sha(third.path) == grown


def test_changed_old_file_is_relabelled(tmp_path):
    total = archive(tmp_path)
    rec = recipe(tmp_path)
    build(rec, keep_work=True, card=False)
    eps = episodes(4, 7)                                         # the file's episodes, one value moved:
    eps[3][0][1, 0] += 0.25                                      # same name, count and lengths
    write(tmp_path / "scripted-day1.npz", eps)
    again = build(rec, keep_work=True, replace=True, card=False)
    assert again.reuse["episodes"] == {"reused": total - 7, "new": 7}
    assert sha(again.path) == fresh_sha(rec)


def test_file_sorting_before_old_ones_moves_only_that_sources_later_files(tmp_path):
    """Ids are positions in a source's files: a file sorting first moves the source's later
    episodes (their random draws change, so they are relabelled); other sources keep theirs.
    One split only, so that the moved episodes differ from the kept ones by their ids alone."""
    total = archive(tmp_path)
    rec = recipe(tmp_path, validation=0.0)
    build(rec, keep_work=True, card=False)
    write(tmp_path / "teleop-day0.npz", episodes(7, 3))       # sorts before teleop-day1 and day2
    again = build(rec, keep_work=True, replace=True, card=False)
    assert again.reuse["episodes"] == {"reused": total - 10, "new": 13}
    assert sha(again.path) == fresh_sha(rec)


def test_recipe_change_reuses_nothing(tmp_path):
    total = archive(tmp_path)
    build(recipe(tmp_path), keep_work=True, card=False)
    rec = recipe(tmp_path, threshold=0.5)
    again = build(rec, keep_work=True, replace=True, card=False)
    assert again.reuse["episodes"] == {"reused": 0, "new": total}
    assert sha(again.path) == fresh_sha(rec)
    assert len(list((tmp_path / ".set.h5.work").glob("unit-*.npz"))) == 4     # the old units were pruned


def test_goals_from_other_episodes_are_never_reused(tmp_path):
    total = archive(tmp_path)
    rec = recipe(tmp_path, extra="other_episode = 1")
    first = build(rec, keep_work=True, card=False)
    assert first.reuse["reason"] == "strategy other_episode takes goals from other episodes"
    write(tmp_path / "teleop-day3.h5", episodes(6, 5))
    again = build(rec, keep_work=True, replace=True, card=False)
    assert again.reuse["episodes"] == {"reused": 0, "new": total + 5}
    assert not (tmp_path / ".set.h5.work").exists()
    assert sha(again.path) == fresh_sha(rec)


def test_local_workers_reuse_and_match(tmp_path):
    total = archive(tmp_path)
    rec = recipe(tmp_path)
    build(rec, keep_work=True, card=False, runner=LocalWorkers(2))
    write(tmp_path / "policy-day2.npz", episodes(8, 4))
    again = build(rec, keep_work=True, replace=True, card=False, runner=LocalWorkers(2))
    assert again.reuse["episodes"] == {"reused": total, "new": 4}
    assert again.shards["total"] == 1                      # only the new unit went to the workers
    assert not (tmp_path / ".set.h5.shards").exists()
    assert sha(again.path) == fresh_sha(rec)


def test_damaged_unit_is_relabelled(tmp_path):
    total = archive(tmp_path)
    rec = recipe(tmp_path)
    build(rec, keep_work=True, card=False)
    unit = sorted((tmp_path / ".set.h5.work").glob("unit-*.npz"))[0]
    data = bytearray(unit.read_bytes())
    data[len(data) // 2] ^= 0xFF
    unit.write_bytes(bytes(data))
    again = build(rec, keep_work=True, replace=True, card=False)
    assert again.reuse["episodes"]["reused"] < total
    assert sha(again.path) == fresh_sha(rec)


def test_work_folder_link_refused_and_foreign_files_kept(tmp_path):
    archive(tmp_path)
    rec = recipe(tmp_path)
    target = tmp_path / "elsewhere"
    target.mkdir()
    os.symlink(target, tmp_path / ".set.h5.work")
    r = CliRunner().invoke(cli_main, ["build", str(rec), "--keep-work", "--no-card", "--quiet"])
    assert r.exit_code == 2 and "symbolic link" in r.output
    assert not (tmp_path / "set.h5").exists() and list(target.iterdir()) == []
    os.unlink(tmp_path / ".set.h5.work")
    (tmp_path / ".set.h5.work").mkdir()
    (tmp_path / ".set.h5.work" / "notes.txt").write_text("mine")
    build(rec, keep_work=True, card=False)
    build(recipe(tmp_path, threshold=0.6), keep_work=True, card=False, replace=True)   # prunes old units
    assert (tmp_path / ".set.h5.work" / "notes.txt").read_text() == "mine"


def test_cli_says_why_nothing_is_reused(tmp_path):
    total = archive(tmp_path)
    rec = recipe(tmp_path, extra="other_episode = 1")
    r = CliRunner().invoke(cli_main, ["build", str(rec), "--keep-work", "--no-card"])
    assert r.exit_code == 0, r.output
    assert (f"reuse: 0 episodes reused (strategy other_episode takes goals from other episodes), "
            f"{total} relabelled") in r.output


def test_cli_reports_reused_and_new(tmp_path):
    total = archive(tmp_path)
    rec = recipe(tmp_path)
    runner = CliRunner()
    r = runner.invoke(cli_main, ["build", str(rec), "--keep-work", "--no-card", "--json", "--quiet"])
    assert r.exit_code == 0, r.output
    assert json.loads(r.output)["reuse"]["episodes"] == {"reused": 0, "new": total}
    write(tmp_path / "scripted-day2.h5", episodes(9, 6))
    r = runner.invoke(cli_main, ["build", str(rec), "--keep-work", "--no-card", "--replace"])
    assert r.exit_code == 0, r.output
    assert f"reuse: {total} episodes reused, 6 new or changed (relabelled)" in r.output
    assert "work folder" in r.output and ".set.h5.work" in r.output


@settings(max_examples=8, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(lengths=st.lists(st.integers(1, 6), min_size=2, max_size=9), data=st.data())
def test_appending_files_then_rebuilding_equals_a_fresh_build(tmp_path_factory, lengths, data):
    """Random episodes cut into random files of two sources (HDF5 or NPZ each); the first files
    are built, the rest appended (they sort after the old files of their source), then rebuilt."""
    d = tmp_path_factory.mktemp("grow")
    r = np.random.default_rng(len(lengths))
    eps = [(r.normal(size=(t + 1, 3)), r.normal(size=(t, 2))) for t in lengths]
    n = len(eps)
    cuts = sorted(data.draw(st.sets(st.integers(1, n - 1), max_size=n - 1), label="cuts"))
    files = [eps[a:b] for a, b in zip([0, *cuts], [*cuts, n])]
    kinds = data.draw(st.lists(st.sampled_from(["h5", "npz"]), min_size=len(files), max_size=len(files)),
                      label="kinds")
    owner = data.draw(st.lists(st.sampled_from(["nozzle", "tray"]), min_size=len(files), max_size=len(files)),
                      label="source of each file")
    old = data.draw(st.integers(1, len(files)), label="files present at first")
    (d / "layout.toml").write_text(LAYOUT)
    (d / "logs").mkdir()
    logs = "".join(f'[[sources]]\nname = "{n}"\npath = "logs/{n}-*"\nlayout = "layout.toml"\n'
                   for n in ("nozzle", "tray"))
    rec = d / "recipe.toml"
    names = [d / "logs" / f"{o}-part{i:02d}.{k}" for i, (o, k) in enumerate(zip(owner, kinds))]
    for p, part in zip(names[:old], files[:old]):
        write(p, part)
    for o in ("nozzle", "tray"):      # a source needs a file: an empty-handed one gets its first now
        if o not in owner[:old]:
            write(d / "logs" / f"{o}-part00-first.npz", episodes(len(lengths), 2))
    present = sum(len(f) for f in files[:old]) + 2 * sum(o not in owner[:old] for o in ("nozzle", "tray"))
    rec.write_text("version = 1\nseed = 3\n" + logs + TAIL.format(threshold=0.4, extra="", validation=0.3))
    build(rec, keep_work=True, card=False)
    for p, part in zip(names[old:], files[old:]):     # appended: they sort after their source's old files
        write(p, part)
    grown = build(rec, keep_work=True, replace=True, card=False)
    assert grown.reuse["episodes"] == {"reused": present, "new": sum(len(f) for f in files[old:])}
    assert sha(grown.path) == fresh_sha(rec)


def test_one_file_recipe_reuses_when_unchanged(tmp_path):
    write(tmp_path / "all.h5", episodes(11, 9))
    (tmp_path / "layout.toml").write_text(LAYOUT)
    rec = tmp_path / "recipe.toml"
    rec.write_text('version = 1\nseed = 3\n[logs]\npath = "all.h5"\nlayout = "layout.toml"\n'
                   + TAIL.format(threshold=0.4, extra="", validation=0.3))
    build(rec, keep_work=True, card=False)
    again = build(load_recipe(rec), keep_work=True, replace=True, card=False)
    assert again.reuse["episodes"] == {"reused": 9, "new": 0}
    assert sha(again.path) == fresh_sha(rec)


def test_new_source_appended_to_the_recipe_reuses_the_others(tmp_path):
    total = archive(tmp_path)
    rec = recipe(tmp_path)
    build(rec, keep_work=True, card=False)
    write(tmp_path / "night-day1.npz", episodes(12, 6))
    rec.write_text(rec.read_text().replace(
        "\n[goal]", '[[sources]]\nname = "night"\npath = "night-*"\nlayout = "layout.toml"\n\n[goal]', 1))
    again = build(rec, keep_work=True, replace=True, card=False)
    assert again.reuse["episodes"] == {"reused": total, "new": 6}
    assert sha(again.path) == fresh_sha(rec)


def test_interrupted_one_process_build_keeps_its_finished_units(tmp_path):
    total = archive(tmp_path)
    rec = recipe(tmp_path)
    calls = []

    def stop_after_two(done, all_transitions):
        calls.append(done)
        if len(calls) == 2:
            raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        build(rec, keep_work=True, card=False, progress=stop_after_two)
    assert not (tmp_path / "set.h5").exists()
    kept = len(list((tmp_path / ".set.h5.work").glob("unit-*.npz")))
    assert kept >= 2
    again = build(rec, keep_work=True, card=False)
    assert again.reuse["units"]["reused"] == kept and again.reuse["episodes"]["new"] < total
    assert sha(again.path) == fresh_sha(rec)


def test_wider_dtype_in_a_new_file_relabels_everything(tmp_path):
    """Observations take the widest dtype of any file: every stored column's dtype is in the key."""
    def narrow(eps):
        return [(o.astype(np.float32), a.astype(np.float32)) for o, a in eps]
    write(tmp_path / "teleop-day1.h5", narrow(episodes(2, 6)))
    write(tmp_path / "scripted-day1.npz", narrow(episodes(4, 7)))
    write(tmp_path / "policy-day1.h5", narrow(episodes(5, 5)))
    rec = recipe(tmp_path)
    build(rec, keep_work=True, card=False)
    write(tmp_path / "policy-day2.npz", episodes(8, 3))          # float64
    again = build(rec, keep_work=True, replace=True, card=False)
    assert again.reuse["episodes"] == {"reused": 0, "new": 21}
    assert sha(again.path) == fresh_sha(rec)


def test_dask_cluster_reuse_and_match(tmp_path):
    distributed = pytest.importorskip("distributed")
    total = archive(tmp_path)
    rec = recipe(tmp_path)
    with distributed.LocalCluster(processes=False, n_workers=1, threads_per_worker=2,
                                  dashboard_address=":0") as cluster, distributed.Client(cluster) as client:
        build(rec, keep_work=True, card=False, runner=DaskCluster(client))
        write(tmp_path / "teleop-day3.npz", episodes(13, 4))
        again = build(rec, keep_work=True, replace=True, card=False, runner=DaskCluster(client))
    assert again.reuse["episodes"] == {"reused": total, "new": 4}
    assert again.shards["total"] == 1
    assert sha(again.path) == fresh_sha(rec)



def _file_size_limit(nbytes):
    def apply():
        # RLIMIT_FSIZE (POSIX setrlimit): writes past the limit fail with EFBIG, as on a full disk
        resource.setrlimit(resource.RLIMIT_FSIZE, (nbytes, resource.RLIM_INFINITY))
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
    return apply


def test_full_work_folder_is_one_line_and_keeps_the_output_clean(tmp_path):
    archive(tmp_path)
    rec = recipe(tmp_path)
    res = subprocess.run([sys.executable, "-m", "goalkit.cli", "build", str(rec), "--keep-work", "--no-card",
                          "--quiet"], cwd=tmp_path, capture_output=True, text=True, timeout=120,
                         preexec_fn=_file_size_limit(6000))
    assert res.returncode == 2, res.stderr
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in res.stderr, res.stderr
    assert lines[0].startswith(f"goalkit: error: {tmp_path / '.set.h5.work'}: cannot write the work folder ("), lines
    assert not (tmp_path / "set.h5").exists()
    assert not [p for p in (tmp_path / ".set.h5.work").iterdir() if p.name.endswith(".tmp")]


HEAD_TABLES = """
[heads.policy]
weights = {geometric = 1, future = 1}
gamma = 0.9
[heads.subgoal]
weights = {subgoal = 1}
steps = 3
"""


def heads_recipe(d: Path, random_head: bool) -> Path:
    """The three-source archive built with goal heads (one row per transition)."""
    rec = recipe(d)
    text = rec.read_text().replace("goals_per_transition = 3", "goals_per_transition = 1")
    text = text.replace('mode = "materialised"', 'mode = "materialised"\ngoals = "heads"')
    tables = HEAD_TABLES + ("[heads.value]\nweights = {current = 0.2, geometric = 0.5, random = 0.3}\n"
                            if random_head else "")
    rec.write_text(text + tables)
    return rec


def test_goal_heads_within_episodes_reuse_byte_identical(tmp_path):
    total = archive(tmp_path)
    rec = heads_recipe(tmp_path, random_head=False)
    first = build(rec, keep_work=True, card=False)
    assert first.reuse["reason"] is None
    write(tmp_path / "teleop-day3.h5", episodes(6, 5))
    again = build(rec, keep_work=True, replace=True, card=False)
    assert again.reuse["episodes"] == {"reused": total, "new": 5}
    assert sha(again.path) == fresh_sha(rec)


def test_goal_heads_drawing_random_states_are_never_reused(tmp_path):
    total = archive(tmp_path)
    rec = heads_recipe(tmp_path, random_head=True)
    first = build(rec, keep_work=True, card=False)
    assert first.reuse["reason"] == "goal heads draw random states from other episodes"
    write(tmp_path / "teleop-day3.h5", episodes(6, 5))
    again = build(rec, keep_work=True, replace=True, card=False)
    assert again.reuse["episodes"] == {"reused": 0, "new": total + 5}
    assert sha(again.path) == fresh_sha(rec)
