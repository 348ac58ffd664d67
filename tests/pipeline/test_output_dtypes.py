"""Stored dtypes of observations, actions and goals: recipe keys, checked casts, identity, reports.

Outside references:
- IEEE 754-2019 (IEEE Standard for Floating-Point Arithmetic), section 4.3.1: the default rounding
  roundTiesToEven; section 7.4: overflow means the rounded result (unbounded exponent) exceeds the
  largest finite number, so a value below max + half an ulp rounds to max, not to infinity.
  binary32 has a 24-bit significand: the relative rounding error of a normal result is at most
  2**-24 (the "unit roundoff"; Higham, 2002, "Accuracy and Stability of Numerical Algorithms",
  2nd ed., section 2.1).
- numpy's own cast (numpy.ndarray.astype, which follows IEEE 754 for float narrowing) and
  numpy.finfo / numpy.iinfo for the limits of each dtype.
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
from hypothesis.extra import numpy as hnp

from goalkit import GoalSampler, build, load_recipe, open_set, verify
from goalkit.audit.run import audit_set
from goalkit.cli import main as cli_main
from goalkit.errors import RecipeError, shown
from goalkit.logs.memory import MemorySource
from goalkit.pipeline.build import build as engine_build
from goalkit.pipeline.casts import cast_problem
from goalkit.pipeline.recipe import parse_recipe
from goalkit.write.adapters import NumpyBatches
from goalkit.write.info import info

from pipeline_cases import make_episodes, recipe_text

LAYOUT = 'version = 1\nshape = "flat"\n[keys]\nobservation = "obs"\naction = "act"\n[boundaries]\nepisode_id = "ids"\n'
RECIPE = """version = 1
seed = 3
[logs]
path = "logs.h5"
layout = "layout.toml"
[goal]
indices = [0, 1]
{goal_dtype}
[relabel]
goals_per_transition = 3
[relabel.weights]
future = 2
final = 1
[reward]
threshold = 0.4
[split]
validation = 0.25
[output]
path = "set.h5"
{output}
"""


def write_logs(path, obs, act, lengths):
    ids = np.repeat(np.arange(len(lengths)), lengths)
    with h5py.File(path, "w") as f:
        f["obs"], f["act"], f["ids"] = obs, act, ids


def gantry_logs(seed=0, n=12, int_actions=False):
    """Invented nozzle-head states (float64) and either float or integer (valve step) actions."""
    r = np.random.default_rng(seed)
    lengths = r.integers(2, 9, n)
    total = int(lengths.sum())
    # flat logs keep T observations per episode and a next observation implied by the next row
    obs = np.cumsum(r.normal(scale=0.1, size=(total, 3)), axis=0) + np.pi     # not exact in float32
    act = r.integers(0, 200, size=(total, 2)) if int_actions else r.normal(size=(total, 2))
    return obs, act, lengths


def setup(tmp_path, output="", goal_dtype="", obs=None, act=None, lengths=None, int_actions=False):
    if obs is None:
        obs, act, lengths = gantry_logs(int_actions=int_actions)
    write_logs(tmp_path / "logs.h5", obs, act, lengths)
    (tmp_path / "layout.toml").write_text(LAYOUT)
    path = tmp_path / "recipe.toml"
    path.write_text(RECIPE.format(output=output, goal_dtype=goal_dtype))
    return path


# ---- recipe keys ------------------------------------------------------------------------------

@pytest.mark.parametrize("line, key", [
    ('observation_dtype = "float8"', "output.observation_dtype"),
    ('observation_dtype = "int16"', "output.observation_dtype"),
    ('action_dtype = "complex64"', "output.action_dtype"),
    ("action_dtype = 32", "output.action_dtype"),
])
def test_bad_dtype_keys_name_the_key(tmp_path, line, key):
    text = RECIPE.format(output=line, goal_dtype="")
    with pytest.raises(RecipeError) as err:
        parse_recipe(text, file="r.toml", base=tmp_path)
    assert err.value.key == key and "float16" in str(err.value)


def test_goal_dtype_takes_float16_and_indexed_sets_refuse_observation_dtypes(tmp_path):
    r = parse_recipe(RECIPE.format(output='observation_dtype = "float16"\naction_dtype = "uint8"',
                                   goal_dtype='dtype = "float16"'), base=tmp_path)
    assert (r.output.observation_dtype, r.output.action_dtype, r.goal.dtype) == ("float16", "uint8", "float16")
    with pytest.raises(RecipeError) as err:
        parse_recipe(RECIPE.format(output='mode = "indexed"\nobservation_dtype = "float32"', goal_dtype=""),
                     base=tmp_path)
    assert err.value.key == "output.observation_dtype"


# ---- a build with chosen dtypes -------------------------------------------------------------

def test_float64_logs_stored_as_float32_round_to_nearest_even(tmp_path):
    path = setup(tmp_path, output='observation_dtype = "float32"\naction_dtype = "float16"',
                 goal_dtype='dtype = "float16"')
    obs, act, lengths = gantry_logs()
    build(load_recipe(path))
    starts = np.concatenate([[0], np.cumsum(lengths)])
    with open_set(tmp_path / "set.h5") as gs:
        for split in ("train", "validation"):
            r = gs.read(split)
            assert r["observation"].dtype == np.float32 and r["next_observation"].dtype == np.float32
            assert r["action"].dtype == np.float16
            assert r["goal"].dtype == np.float16 and r["reached_goal"].dtype == np.float16
            # flat logs of T rows per episode: s_t is row start + t of the log
            row = starts[r["source_episode"]] + r["source_step"]
            logged = obs[row]
            # the reference cast: numpy's astype (IEEE 754 roundTiesToEven)
            np.testing.assert_array_equal(r["observation"], logged.astype(np.float32))
            np.testing.assert_array_equal(r["action"], act[row].astype(np.float16))
            # IEEE 754 binary32: relative error of a normal result at most 2**-24
            rel = np.abs(r["observation"].astype(np.float64) - logged) / np.abs(logged)
            assert rel.max() <= 2.0 ** -24 and rel.max() > 0       # rounding happened and stayed in bound
            np.testing.assert_array_equal(r["reached_goal"], obs[row + 1][:, :2].astype(np.float16))
    facts = info(tmp_path / "set.h5")
    assert facts["dtypes"] == {"observation": "float32", "action": "float16", "next_observation": "float32",
                               "goal": "float16"}
    with h5py.File(tmp_path / "set.h5", "r") as f:
        summary = json.loads(f.attrs["summary"])
    assert summary["composition"]["dtypes"] == facts["dtypes"]
    report = verify(tmp_path / "set.h5")
    assert report.ok, report.failures


def test_integer_actions_stored_as_int16_and_the_card_and_info_say_so(tmp_path):
    path = setup(tmp_path, output='action_dtype = "int16"\nobservation_dtype = "float32"', int_actions=True)
    res = CliRunner().invoke(cli_main, ["build", str(path)])          # the card is written by default
    assert res.exit_code == 0, res.output
    with open_set(tmp_path / "set.h5") as gs:
        a = gs.read("train", ["action"])["action"]
    assert a.dtype == np.int16 and a.min() >= 0 and a.max() < 200
    card = (tmp_path / "set.h5.card.md").read_text()
    assert "Stored dtypes: observation float32, action int16, next_observation float32, goal float32." in card
    out = CliRunner().invoke(cli_main, ["info", str(tmp_path / "set.h5")])
    assert "dtypes: observation float32, action int16" in out.output
    assert verify(tmp_path / "set.h5").ok


def test_integer_action_dtype_for_float_actions_is_refused(tmp_path):
    path = setup(tmp_path, output='action_dtype = "int32"')
    res = CliRunner().invoke(cli_main, ["build", str(path)])
    assert res.exit_code == 2
    line = res.stderr.strip()
    assert "\n" not in line and "output.action_dtype" in line and "float64" in line
    assert not (tmp_path / "set.h5").exists()


# ---- overflow: one line, file, key, episode, step and value; nothing written ----------------------

def overflow_case(tmp_path, value, column, dtype_line, int_actions=False):
    obs, act, lengths = gantry_logs(int_actions=int_actions)
    ep, step = int(np.flatnonzero(lengths >= 3)[2]), 1       # an episode with a transition at step 1
    row = int(np.sum(lengths[:ep])) + step
    target = obs if column == "obs" else act
    target[row, 1] = value
    return setup(tmp_path, output=dtype_line, obs=obs, act=act, lengths=lengths), ep, step


@pytest.mark.parametrize("value, column, dtype_line, int_actions", [
    (2.0 ** 128, "obs", 'observation_dtype = "float32"', False),        # above float32's overflow threshold
    (70000.0, "obs", 'observation_dtype = "float16"', False),          # float16 max is 65504
    (-1e6, "act", 'action_dtype = "float16"', False),
    (40000, "act", 'action_dtype = "int16"', True),                    # int16 holds -32768 .. 32767
    (-1, "act", 'action_dtype = "uint8"', True),
])
def test_an_overflowing_cast_names_file_key_episode_step_and_value(tmp_path, value, column, dtype_line,
                                                                   int_actions):
    path, ep, step = overflow_case(tmp_path, value, column, dtype_line, int_actions)
    res = CliRunner().invoke(cli_main, ["build", str(path)])
    assert res.exit_code == 2, res.output
    line = res.stderr.strip()
    assert "\n" not in line and "Traceback" not in line
    assert str(tmp_path / "logs.h5") in line
    assert f"key {column}" in line and f"episode {ep}" in line and f"step {step}" in line
    assert f"value {shown(value)} " in line, line
    assert dtype_line.split(" =")[0] in line
    assert not (tmp_path / "set.h5").exists()
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".set.h5")]


def test_values_between_float32_max_and_the_overflow_threshold_round_to_max(tmp_path):
    # IEEE 754-2019 section 7.4: only a rounded result beyond max overflows; max + a third of an
    # ulp (ulp of max = 2**104) rounds down to max under roundTiesToEven
    fmax = float(np.finfo(np.float32).max)
    obs, act, lengths = gantry_logs()
    obs[4, 0] = fmax + 2.0 ** 104 / 3
    obs[6, 2] = -fmax
    path = setup(tmp_path, output='observation_dtype = "float32"', obs=obs, act=act, lengths=lengths)
    build(load_recipe(path))
    with open_set(tmp_path / "set.h5") as gs:
        got = np.concatenate([gs.read(s, [c])[c] for s in ("train", "validation")
                              for c in ("observation", "next_observation")])
    assert got.max() == np.finfo(np.float32).max and got.min() == -np.finfo(np.float32).max
    assert np.isfinite(got).all()


# ---- identity whatever the chunk size and worker count -------------------------------------------

def digest(path):
    return hashlib.sha256(open(path, "rb").read()).hexdigest()


def test_dtype_recipe_is_byte_identical_across_chunk_sizes(tmp_path):
    episodes = make_episodes()
    episodes = type(episodes)(**{**episodes.__dict__, "observations": episodes.observations.astype(np.float64)})
    same = tmp_path / "same.h5"
    text = recipe_text(same, weights="future = 2\nother_episode = 1\ngeometric = 1\noriginal = 1")
    text = text.replace('compression = "gzip"', 'compression = "gzip"\nobservation_dtype = "float16"\n'
                                                'action_dtype = "float32"')
    recipe = parse_recipe(text.replace("[goal]\n", '[goal]\ndtype = "float16"\n'))
    digests = set()
    for rows in (1000, 4321, 1_000_000):
        engine_build(recipe, source=MemorySource(episodes), max_rows_per_chunk=rows, replace=True)
        digests.add(digest(same))
    assert len(digests) == 1
    with open_set(same) as gs:
        assert gs.read("train", ["observation"])["observation"].dtype == np.float16


def test_dtype_recipe_is_byte_identical_on_two_workers(tmp_path):
    path = setup(tmp_path, output='observation_dtype = "float16"\naction_dtype = "float32"',
                 goal_dtype='dtype = "float16"')
    recipe = load_recipe(path)
    engine_build(recipe, max_rows_per_chunk=300)
    one = digest(tmp_path / "set.h5")
    engine_build(recipe, workers=2, max_rows_per_chunk=300, replace=True)
    assert digest(tmp_path / "set.h5") == one


# ---- the audit derives the expected dtypes and values itself --------------------------------------

def test_the_audit_expects_the_recipes_dtypes(tmp_path):
    path = setup(tmp_path, output='observation_dtype = "float32"')
    build(load_recipe(path))
    assert audit_set(tmp_path / "set.h5").ok
    # the same rows under a recipe asking for other dtypes: the audit reads the recipe, not the builder
    for old, new, column in (('observation_dtype = "float32"', 'observation_dtype = "float16"', "observation"),
                             ('observation_dtype = "float32"\n', "", "observation")):
        with h5py.File(tmp_path / "set.h5", "r+") as f:
            text = str(f.attrs["recipe"])
            f.attrs["recipe"] = text.replace(old, new)
        report = audit_set(tmp_path / "set.h5")
        expected = "float16" if new else "float64"
        assert any(f"train/{column} is stored as float32, expected {expected}" in m for m in report.failures)
        assert any("observation value" in m for m in report.failures)
        with h5py.File(tmp_path / "set.h5", "r+") as f:
            f.attrs["recipe"] = text


# ---- training adapters follow the chosen dtype -----------------------------------------------------

def test_adapters_keep_a_chosen_dtype_and_cast_the_others(tmp_path):
    path = setup(tmp_path, output='observation_dtype = "float16"', goal_dtype='dtype = "float64"')
    build(load_recipe(path))
    batch = next(iter(NumpyBatches(tmp_path / "set.h5", batch_size=8, seed=0)))
    assert batch["observation"].dtype == np.float16 and batch["next_observation"].dtype == np.float16
    assert batch["goal"].dtype == np.float64                 # chosen in the recipe: kept
    assert batch["action"].dtype == np.float64                # not chosen, not cast by default
    assert batch["reward"].dtype == np.float32


# ---- the cast check as an indexing rule (hypothesis) -------------------------------------------------

@settings(max_examples=200, deadline=None)
@given(hnp.arrays(np.float64, st.integers(1, 40),
                  elements=st.floats(allow_nan=False, allow_infinity=False, width=64)),
       st.sampled_from(["float16", "float32"]))
def test_flagged_values_are_exactly_those_that_overflow(values, dtype):
    out, bad = cast_problem(values, dtype)
    info = np.finfo(dtype)
    # IEEE 754 overflow threshold: max + half an ulp of max (ties to even round up to infinity)
    threshold = float(info.max) + 2.0 ** (info.maxexp - info.nmant - 2)
    expect = np.abs(values) >= threshold
    assert np.array_equal(np.zeros_like(expect) if bad is None else bad, expect)
    ok = ~expect
    assert np.isfinite(out[ok]).all()
    normal = ok & (np.abs(values) >= info.tiny)
    rel = np.abs(out[normal].astype(np.float64) - values[normal]) / np.abs(values[normal])
    assert (rel <= 2.0 ** -(info.nmant + 1)).all()          # unit roundoff 2**-p, p = nmant + 1 bits


@settings(max_examples=200, deadline=None)
@given(hnp.arrays(np.int64, st.integers(1, 40), elements=st.integers(-2 ** 40, 2 ** 40)),
       st.sampled_from(["int8", "int16", "int32", "uint8", "uint16", "uint32"]))
def test_integer_casts_flag_exactly_the_values_out_of_range(values, dtype):
    out, bad = cast_problem(values, dtype)
    info = np.iinfo(dtype)
    expect = (values < info.min) | (values > info.max)
    assert np.array_equal(np.zeros_like(expect) if bad is None else bad, expect)
    if bad is None:
        assert out.dtype == np.dtype(dtype) and np.array_equal(out.astype(np.int64), values)


def test_a_task_goal_beyond_a_float16_goal_is_refused_at_its_transition(tmp_path):
    obs, act, lengths = gantry_logs()
    task = np.zeros((len(obs), 2))
    ep = 3
    task[int(np.sum(lengths[:ep])) + 1, 0] = 1e5                 # float16 max is 65504
    write_logs(tmp_path / "logs.h5", obs, act, lengths)
    with h5py.File(tmp_path / "logs.h5", "a") as f:
        f["target"] = task
    (tmp_path / "layout.toml").write_text(LAYOUT.replace('action = "act"', 'action = "act"\ntask_goal = "target"'))
    text = RECIPE.format(output="", goal_dtype='dtype = "float16"').replace("final = 1", "final = 1\noriginal = 50")
    (tmp_path / "recipe.toml").write_text(text)
    res = CliRunner().invoke(cli_main, ["build", str(tmp_path / "recipe.toml")])
    assert res.exit_code == 2, res.output
    line = res.stderr.strip()
    assert "\n" not in line and f"key target: episode {ep}: step 1: value 100000.0 overflows float16" in line, line
    assert "goal.dtype" in line and not (tmp_path / "set.h5").exists()


def test_the_fresh_goal_sampler_gives_the_stored_dtypes(tmp_path):
    path = setup(tmp_path, output='observation_dtype = "float32"\naction_dtype = "float16"',
                 goal_dtype='dtype = "float16"')
    batch = GoalSampler(load_recipe(path)).batch(32, index=0)
    obs, _, _ = gantry_logs()
    assert batch["observation"].dtype == np.float32 and batch["action"].dtype == np.float16
    assert batch["goal"].dtype == np.float16
    assert np.isin(batch["observation"][:, 0], obs[:, 0].astype(np.float32)).all()


def test_halfway_values_round_to_the_even_neighbour(tmp_path):
    # IEEE 754-2019 4.3.1 roundTiesToEven, worked by hand (not by numpy): in binary32 the
    # neighbours of 1 are 1 and 1 + 2**-23; 1 + 2**-24 lies half-way and goes to 1 (even
    # significand), 1 + 3 * 2**-24 lies half-way between 1 + 2**-23 and 1 + 2**-22 and goes up
    obs, act, lengths = gantry_logs()
    obs[:, 2] = 1.0 + 2.0 ** -24
    obs[1::2, 2] = 1.0 + 3 * 2.0 ** -24
    path = setup(tmp_path, output='observation_dtype = "float32"', obs=obs, act=act, lengths=lengths)
    build(load_recipe(path))
    starts = np.concatenate([[0], np.cumsum(lengths)])
    with open_set(tmp_path / "set.h5") as gs:
        r = gs.read("train", ["observation", "source_episode", "source_step"])
    odd = (starts[r["source_episode"]] + r["source_step"]) % 2 == 1
    got = r["observation"][:, 2].astype(np.float64)
    assert (got[~odd] == 1.0).all() and (got[odd] == 1.0 + 2.0 ** -22).all()
