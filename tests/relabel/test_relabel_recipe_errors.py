"""Every error of the [reward] and [relabel] tables: the domain error (object and parameter, no
file) that RewardRule and Mixture raise, and the recipe error (file and key) the loader makes of it."""

import numpy as np
import pytest

from goalkit.errors import ParameterError, RecipeError, StrategyError
from goalkit.pipeline.recipe import parse_recipe
from goalkit.relabel import Mixture, RelabelContext
from goalkit.reward import RewardRule
from relabel_testdata import make_set

FILE = "gantry-recipe.toml"


def _domain_then_recipe(make, table, owner, name):
    with pytest.raises(ParameterError) as info:
        make(table)
    err = info.value
    assert err.owner == owner and err.file is None and err.key is None
    assert str(err) == f"{owner}{'' if err.parameter is None else ' ' + err.parameter}: {err.message}"
    mapped = err.in_recipe(FILE, name)
    assert isinstance(mapped, RecipeError) and mapped.file == FILE and mapped.message == err.message
    return mapped


def reward_error(table):
    return _domain_then_recipe(RewardRule.from_table, table, "RewardRule", "reward")


def relabel_error(table):
    return _domain_then_recipe(Mixture.from_table, table, "Mixture", "relabel")


# ---- [reward] -----------------------------------------------------------------------------
def test_reward_unknown_key_lists_valid_keys_and_closest():
    err = reward_error({"threshold": 0.05, "treshold": 0.1})
    assert err.key == "reward.treshold"
    assert "did you mean 'threshold'?" in err.message
    assert "distance, threshold, inclusive, form, weights, clip, end_on_reach" in err.message


def test_reward_unknown_distance_and_form():
    err = reward_error({"threshold": 0.05, "distance": "manhatan"})
    assert err.key == "reward.distance"
    assert "euclidean, l1, chebyshev, cosine, box" in err.message
    err = reward_error({"threshold": 0.05, "form": "sparse_negative"})
    assert err.key == "reward.form" and "did you mean 'sparse-negative'?" in err.message
    assert "clipped-negative-distance" in err.message
    assert reward_error({"threshold": 0.05, "distance": 3}).key == "reward.distance"


@pytest.mark.parametrize("thr", [-0.01, float("nan"), float("inf"), "0.05", True])
def test_reward_bad_threshold(thr):
    assert reward_error({"threshold": thr}).key == "reward.threshold"


def test_reward_missing_threshold():
    err = reward_error({"distance": "l1"})
    assert err.key == "reward.threshold" and "missing" in err.message


def test_reward_threshold_list_needs_box_and_box_needs_list():
    err = reward_error({"distance": "euclidean", "threshold": [0.1, 0.1]})
    assert err.key == "reward.threshold" and "box" in err.message
    err = reward_error({"distance": "box", "threshold": 0.1})
    assert err.key == "reward.threshold" and "chebyshev" in err.message


@pytest.mark.parametrize("tol", [[0.1, 0.0], [0.1, -0.2], [], [0.1, "x"]])
def test_reward_bad_box_tolerances(tol):
    assert reward_error({"distance": "box", "threshold": tol}).key == "reward.threshold"


def test_reward_check_dim():
    box = RewardRule.from_table({"distance": "box", "threshold": [0.1, 0.1, 0.2]})
    box.check_dim(3)
    with pytest.raises(ParameterError, match="expected 2 tolerances") as info:
        box.check_dim(2)
    assert info.value.parameter == "threshold" and info.value.file is None
    weighted = RewardRule.from_table({"threshold": 0.1, "weights": [1, 2]})
    weighted.check_dim(2)
    with pytest.raises(ParameterError, match="expected 3 weights") as info:
        weighted.check_dim(3)
    assert info.value.parameter == "weights"


@pytest.mark.parametrize("weights", [[1.0, -0.5], [0, 0], [], 1.0, [1, "a"], [1, float("nan")]])
def test_reward_bad_weights(weights):
    assert reward_error({"threshold": 0.1, "weights": weights}).key == "reward.weights"


def test_reward_box_takes_no_weights():
    err = reward_error({"distance": "box", "threshold": [0.1, 0.1], "weights": [1, 1]})
    assert err.key == "reward.weights"


@pytest.mark.parametrize("clip", [0, -1.0, "1", float("inf")])
def test_reward_bad_clip(clip):
    err = reward_error({"threshold": 0.1, "form": "clipped-negative-distance", "clip": clip})
    assert err.key == "reward.clip"


def test_reward_clip_missing_or_misplaced():
    err = reward_error({"threshold": 0.1, "form": "clipped-negative-distance"})
    assert err.key == "reward.clip" and "needs clip" in err.message
    err = reward_error({"threshold": 0.1, "form": "sparse", "clip": 1.0})
    assert err.key == "reward.clip" and "only with" in err.message


@pytest.mark.parametrize("key", ["inclusive", "end_on_reach"])
def test_reward_flags_must_be_booleans(key):
    assert reward_error({"threshold": 0.1, key: "yes"}).key == f"reward.{key}"


def test_reward_table_must_be_a_table():
    assert reward_error([("threshold", 0.1)]).key == "reward"


def test_reward_constructor_checks_too():
    with pytest.raises(ParameterError):
        RewardRule("euclidean", -1.0)


# ---- [relabel] ----------------------------------------------------------------------------
def test_relabel_unknown_key():
    err = relabel_error({"goals_per_transitions": 4})
    assert err.key == "relabel.goals_per_transitions" and "did you mean 'goals_per_transition'?" in err.message
    assert "weights" in err.message and "gamma" in err.message


def test_relabel_unknown_strategy_lists_valid_and_closest():
    err = relabel_error({"weights": {"futur": 1}})
    assert err.key == "relabel.weights.futur"
    assert "did you mean 'future'?" in err.message
    assert "original, final, future, episode, geometric, other_episode" in err.message


def test_relabel_library_strategy_needs_a_library_file():
    # codes 6-8 are available now; the library strategy without its file is refused
    err = relabel_error({"weights": {"library": 1}})
    assert err.key == "relabel.library" and "targets" in err.message


@pytest.mark.parametrize("w", [-1, "2", float("nan"), True])
def test_relabel_bad_weight(w):
    assert relabel_error({"weights": {"future": 1, "final": w}}).key == "relabel.weights.final"


@pytest.mark.parametrize("weights", [{"future": 0, "final": 0.0}, {}])
def test_relabel_all_zero_or_empty_weights(weights):
    assert relabel_error({"weights": weights}).key == "relabel.weights"


def test_relabel_weights_must_be_a_table():
    assert relabel_error({"weights": ["future"]}).key == "relabel.weights"


@pytest.mark.parametrize("gamma", [0.0, 1.0, -0.2, 1.5, "0.9", float("nan")])
def test_relabel_gamma_outside_open_unit_interval(gamma):
    assert relabel_error({"gamma": gamma}).key == "relabel.gamma"


@pytest.mark.parametrize("k", [0, -3, 2.5, True, "4"])
def test_relabel_goals_per_transition(k):
    assert relabel_error({"goals_per_transition": k}).key == "relabel.goals_per_transition"


def test_relabel_past_end():
    err = relabel_error({"past_end": "truncated"})
    assert err.key == "relabel.past_end" and "did you mean 'truncate'?" in err.message


def test_relabel_table_must_be_a_table():
    assert relabel_error(3).key == "relabel"


def test_assign_original_without_task_goals():
    # refused even if no slot would draw 'original', so the error does not depend on the seed
    chunk = make_set([2, 3], with_task_goals=False)
    mix = Mixture({"original": 1e-9, "future": 1.0})
    with pytest.raises(StrategyError, match="own goals") as info:
        mix.assign(chunk, 0, RelabelContext.from_lengths([2, 3]))
    assert info.value.key is None and info.value.file == "bench-log.h5"
    # weight 0 means the strategy is unused: no error
    rows = Mixture({"original": 0, "future": 1.0}).assign(chunk, 0, RelabelContext.from_lengths([2, 3]))
    assert rows.external is None and np.all(rows.goal_episode >= 0)


# ---- the same mistakes from Python and in a recipe file ------------------------------------
def test_python_user_gets_a_domain_error_without_file_or_key():
    with pytest.raises(ParameterError) as info:
        RewardRule("euclidean", -0.5)
    assert str(info.value) == "RewardRule threshold: expected a finite number >= 0, got -0.5"
    assert info.value.file is None and info.value.key is None
    assert isinstance(info.value, ValueError)  # what Python code building an object expects
    with pytest.raises(ParameterError) as info:
        Mixture({"future": 1.0}, gamma=1.5)
    assert str(info.value) == "Mixture gamma: expected a number strictly between 0 and 1, got 1.5"
    with pytest.raises(ParameterError) as info:
        Mixture({"futur": 1.0})
    assert str(info.value).startswith("Mixture weights.futur: unknown strategy 'futur'; did you mean 'future'?")
    assert "gantry" not in str(info.value) and "key" not in str(info.value)


RECIPE = """
[logs]
path = "logs.h5"
[goal]
fields = ["nozzle"]
[relabel]
{relabel}
[reward]
{reward}
[output]
path = "set.h5"
"""


@pytest.mark.parametrize("relabel, reward, key, message", [
    ("", "threshold = -0.5", "reward.threshold", "expected a finite number >= 0, got -0.5"),
    ("", "threshold = 0.1\ndistance = \"manhatan\"", "reward.distance", "unknown distance 'manhatan'"),
    ("", "threshold = 0.1\nform = \"clipped-negative-distance\"", "reward.clip", "needs clip"),
    ("gamma = 1.5", "threshold = 0.1", "relabel.gamma", "expected a number strictly between 0 and 1, got 1.5"),
    ("[relabel.weights]\nfutur = 1", "threshold = 0.1", "relabel.weights.futur", "did you mean 'future'?"),
])
def test_the_same_mistake_in_a_recipe_names_file_and_key(relabel, reward, key, message):
    text = RECIPE.format(relabel=relabel, reward=reward)
    with pytest.raises(RecipeError) as info:
        parse_recipe(text, file=FILE)
    err = info.value
    assert err.file == FILE and err.key == key and message in err.message
    assert str(err).startswith(f"{FILE}: key {key}: ")
    assert "RewardRule" not in str(err) and "Mixture" not in str(err)


def test_the_cli_prints_one_line_with_file_and_key_and_exits_2(tmp_path):
    from click.testing import CliRunner

    from goalkit.cli import main

    recipe = tmp_path / "gantry-recipe.toml"
    recipe.write_text(RECIPE.format(relabel="", reward="threshold = -0.5"))
    res = CliRunner().invoke(main, ["build", str(recipe)])
    assert res.exit_code == 2
    assert res.stderr.strip().splitlines() == [
        f"goalkit: error: {recipe}: key reward.threshold: expected a finite number >= 0, got -0.5"]
