"""Per-source goal rows: ``[[sources]] goals_per_transition`` (docs/recipe.md).

The rule: a transition of source s gets slots 0 .. k_s - 1, k_s its source's own
goals_per_transition (else [relabel]'s), and slot j is drawn from (seed, episode id, step, j)
exactly as with one count for all, so a source's rows depend neither on the other sources nor on
their counts. Invented gantry logs (unit-test data).
"""

from __future__ import annotations

import hashlib
import json

import h5py
import numpy as np
import pytest
from click.testing import CliRunner
from hypothesis import given, settings
from hypothesis import strategies as st

from goalkit import build, load_recipe, open_set, verify
from goalkit.audit.run import audit_set
from goalkit.cli import main as cli_main
from goalkit.logs.episodes import EpisodeSet
from goalkit.pipeline.build import build as engine_build
from goalkit.relabel import Mixture, RelabelContext
from goalkit.write.info import info

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
[reward]
threshold = 0.4
[split]
validation = 0.3
[output]
path = "{out}"
"""


def write(path, seed, n):
    r = np.random.default_rng(seed)
    lengths = r.integers(2, 9, n)
    total = int(lengths.sum())
    with h5py.File(path, "w") as f:
        f["obs"] = np.cumsum(r.normal(size=(total, 3)), axis=0)
        f["act"] = r.normal(size=(total, 2))
        f["ids"] = np.repeat(np.arange(n), lengths)


def source_table(name, file, k=None):
    extra = "" if k is None else f"goals_per_transition = {k}\n"
    return f'[[sources]]\nname = "{name}"\npath = "{file}"\nlayout = "layout.toml"\n{extra}'


def make_recipe(d, name, sources):
    (d / "layout.toml").write_text(LAYOUT)
    path = d / f"{name}.toml"
    path.write_text("version = 1\nseed = 7\n" + "".join(sources) + TAIL.format(out=f"{name}.h5"))
    return path


@pytest.fixture
def archive(tmp_path):
    write(tmp_path / "teleop.h5", 1, 9)
    write(tmp_path / "scripted.h5", 2, 11)
    write(tmp_path / "policy.h5", 3, 7)
    return tmp_path


def per_episode_rows(path):
    out = {}
    with h5py.File(path, "r") as f:
        for s in ("train", "validation"):
            ep, src, slot = f[s]["source_episode"][:], f[s]["source"][:], f[s]["slot"][:]
            for code in np.unique(src):
                out.setdefault(int(code), []).append(slot[src == code])
    return {c: np.concatenate(v) for c, v in out.items()}


def test_each_source_gets_its_own_goal_count(archive):
    path = make_recipe(archive, "w", [source_table("teleop", "teleop.h5", 6), source_table("scripted", "scripted.h5", 1),
                                      source_table("policy-v3", "policy.h5")])
    build(load_recipe(path))
    out = archive / "w.h5"
    with h5py.File(out, "r") as f:
        summary = json.loads(f.attrs["summary"])
        prov = json.loads(f.attrs["provenance"])
        for s in ("train", "validation"):
            src, slot = f[s]["source"][:], f[s]["slot"][:]
            ep, t = f[s]["source_episode"][:], f[s]["source_step"][:]
            for code, k in enumerate((6, 1, 3)):
                mine = src == code
                # every transition of the source has exactly slots 0 .. k - 1
                assert set(np.unique(slot[mine]).tolist()) <= set(range(k))
                keys = ep[mine] * 1000 + t[mine]
                _, counts = np.unique(keys, return_counts=True)
                assert (counts == k).all()
    by = summary["sources"]
    transitions = {r["name"]: r["transitions"] for r in prov["sources"]}
    for name, k in (("teleop", 6), ("scripted", 1), ("policy-v3", 3)):
        assert by[name]["goals_per_transition"] == k
        assert by[name]["rows"]["train"] + by[name]["rows"]["validation"] == k * transitions[name]
    facts = info(out)
    assert facts["by_source"] == by
    card = (archive / "w.h5.card.md").read_text()
    assert "| `teleop` |" in card and "goals per transition" in card
    report = verify(out)
    assert report.ok, report.failures


def strip_source(path, code):
    """The rows of one source, without the source column (its code is its place in the recipe)."""
    with h5py.File(path, "r") as f:
        out = {}
        for s in ("train", "validation"):
            mine = f[s]["source"][:] == code
            out[s] = {k: f[s][k][:][mine] for k in f[s] if k != "source"}
    return out


def test_adding_a_source_or_changing_anothers_count_never_moves_a_sources_rows(archive):
    a = make_recipe(archive, "a", [source_table("teleop", "teleop.h5", 2), source_table("scripted", "scripted.h5")])
    b = make_recipe(archive, "b", [source_table("policy-v3", "policy.h5", 5), source_table("teleop", "teleop.h5", 2),
                                   source_table("scripted", "scripted.h5", 4)])
    build(load_recipe(a))
    build(load_recipe(b))
    ra, rb = strip_source(archive / "a.h5", 0), strip_source(archive / "b.h5", 1)    # teleop's rows
    for s in ("train", "validation"):
        assert set(ra[s]) == set(rb[s])
        for k in ra[s]:
            np.testing.assert_array_equal(ra[s][k], rb[s][k], err_msg=k)
    # scripted: 3 slots in a (the [relabel] count), 4 in b: slots 0..2 are the same rows
    sa, sb = strip_source(archive / "a.h5", 1), strip_source(archive / "b.h5", 2)
    for s in ("train", "validation"):
        first3 = sb[s]["slot"] < 3
        for k in sa[s]:
            np.testing.assert_array_equal(sa[s][k], sb[s][k][first3], err_msg=k)


def test_a_source_with_zero_goal_rows_has_no_rows_and_verifies(archive):
    path = make_recipe(archive, "z", [source_table("teleop", "teleop.h5", 0), source_table("scripted", "scripted.h5")])
    res = CliRunner().invoke(cli_main, ["build", str(path)])
    assert res.exit_code == 0, res.output
    lines = {ln.split()[0]: ln.split() for ln in res.output.splitlines() if ln.strip().startswith(("teleop", "scripted"))}
    assert lines["teleop"][3] == "0" and lines["teleop"][4] == "0/0" and lines["scripted"][3] == "3"
    with h5py.File(archive / "z.h5", "r") as f:
        assert all((f[s]["source"][:] == 1).all() for s in ("train", "validation"))
        assert json.loads(f.attrs["summary"])["sources"]["teleop"]["rows"] == {"train": 0, "validation": 0}
    assert verify(archive / "z.h5").ok


def test_the_audit_counts_rows_per_source_from_the_recipe_text(archive):
    path = make_recipe(archive, "c", [source_table("teleop", "teleop.h5", 2), source_table("scripted", "scripted.h5")])
    build(load_recipe(path))
    out = archive / "c.h5"
    assert audit_set(out).ok
    with h5py.File(out, "r+") as f:      # the same rows under a recipe asking for 4 teleop rows each
        f.attrs["recipe"] = str(f.attrs["recipe"]).replace("goals_per_transition = 2", "goals_per_transition = 4")
    report = audit_set(out)
    assert not report.ok
    assert any(m.startswith("source 'teleop':") and "expected" in m for m in report.failures), report.failures
    assert any("T x goals_per_transition of its source" in m for m in report.failures)


@pytest.mark.parametrize("value, shown", [("-1", "-1"), ("1.5", "1.5"), ("inf", "inf"), ("nan", "nan"),
                                          ("true", "True"), ('"3"', "'3'"), ("1025", "1025")])
def test_bad_goal_counts_are_one_line_with_file_and_key(archive, value, shown):
    path = make_recipe(archive, "bad", [source_table("teleop", "teleop.h5"),
                                        source_table("scripted", "scripted.h5", value)])
    res = CliRunner().invoke(cli_main, ["build", str(path)])
    assert res.exit_code == 2
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in res.stderr
    assert str(path) in lines[0] and "key sources[1].goals_per_transition" in lines[0]
    assert f"got {shown}" in lines[0], lines[0]
    assert not (archive / "bad.h5").exists()


def test_every_source_at_zero_is_refused(archive):
    path = make_recipe(archive, "zz", [source_table("teleop", "teleop.h5", 0), source_table("scripted", "scripted.h5", 0)])
    res = CliRunner().invoke(cli_main, ["build", str(path)])
    assert res.exit_code == 2 and "key sources[0].goals_per_transition" in res.stderr


# ---- the slot rule as an indexing rule (hypothesis) -----------------------------------------

@settings(max_examples=60, deadline=None)
@given(st.lists(st.integers(1, 12), min_size=1, max_size=6), st.data(), st.integers(0, 2 ** 32))
def test_slots_of_a_transition_are_the_first_rows_of_a_uniform_count(lengths, data, seed):
    offsets = np.concatenate([[0], np.cumsum(lengths)]).astype(np.int64)
    n, e = int(offsets[-1]), len(lengths)
    chunk = EpisodeSet(observations=np.arange((n + e) * 2, dtype=np.float64).reshape(-1, 2),
                       actions=np.zeros((n, 1)), offsets=offsets,
                       episode_ids=np.array(sorted(data.draw(st.sets(st.integers(0, 10 ** 6), min_size=e,
                                                                      max_size=e))), dtype=np.int64))
    counts = np.array(data.draw(st.lists(st.integers(0, 7), min_size=n, max_size=n)), dtype=np.int64)
    mix = Mixture({"future": 2, "final": 1, "episode": 1, "geometric": 1}, goals_per_transition=7)
    ctx = RelabelContext.from_lengths(lengths)
    full = mix.assign(chunk, seed, ctx)
    part = mix.assign(chunk, seed, ctx, slots=counts)
    keep = full.slot < counts[full.transition]
    assert len(part) == int(counts.sum())
    for name in ("transition", "slot", "strategy", "goal_episode", "goal_step", "steps_to_goal"):
        np.testing.assert_array_equal(getattr(part, name), getattr(full, name)[keep], err_msg=name)


def test_per_source_counts_are_byte_identical_on_workers_and_chunk_sizes(archive):
    path = make_recipe(archive, "wk", [source_table("teleop", "teleop.h5", 0), source_table("scripted", "scripted.h5", 5),
                                       source_table("policy-v3", "policy.h5", 2)])
    recipe = load_recipe(path)
    digests = set()
    for kwargs in ({"max_rows_per_chunk": 40}, {"max_rows_per_chunk": 100_000}, {"workers": 2, "max_rows_per_chunk": 40}):
        engine_build(recipe, replace=True, **kwargs)
        digests.add(hashlib.sha256((archive / "wk.h5").read_bytes()).hexdigest())
    assert len(digests) == 1
