"""Every RecipeError of the [reward] and [relabel] tables: key, file and message."""

import numpy as np
import pytest

from goalkit.errors import RecipeError
from goalkit.relabel import Mixture, RelabelContext
from goalkit.reward import RewardRule
from relabel_testdata import make_set

FILE = "gantry-recipe.toml"


def reward_error(table):
    with pytest.raises(RecipeError) as info:
        RewardRule.from_table(table, FILE)
    assert info.value.file == FILE
    return info.value


def relabel_error(table):
    with pytest.raises(RecipeError) as info:
        Mixture.from_table(table, FILE)
    assert info.value.file == FILE
    return info.value


# ---- [reward] -----------------------------------------------------------------------------
def test_reward_unknown_key_lists_valid_keys_and_closest():
    err = reward_error({"threshold": 0.05, "treshold": 0.1})
    assert err.key == "treshold"
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
    box = RewardRule.from_table({"distance": "box", "threshold": [0.1, 0.1, 0.2]}, FILE)
    box.check_dim(3, FILE)
    with pytest.raises(RecipeError, match="expected 2 tolerances") as info:
        box.check_dim(2, FILE)
    assert info.value.key == "reward.threshold" and info.value.file == FILE
    weighted = RewardRule.from_table({"threshold": 0.1, "weights": [1, 2]}, FILE)
    weighted.check_dim(2, FILE)
    with pytest.raises(RecipeError, match="expected 3 weights") as info:
        weighted.check_dim(3, FILE)
    assert info.value.key == "reward.weights"


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
    with pytest.raises(RecipeError):
        RewardRule("euclidean", -1.0)


# ---- [relabel] ----------------------------------------------------------------------------
def test_relabel_unknown_key():
    err = relabel_error({"goals_per_transitions": 4})
    assert err.key == "goals_per_transitions" and "did you mean 'goals_per_transition'?" in err.message
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
    with pytest.raises(RecipeError, match="own goals") as info:
        mix.assign(chunk, 0, RelabelContext.from_lengths([2, 3]))
    assert info.value.key == "relabel.weights.original"
    # weight 0 means the strategy is unused: no error
    rows = Mixture({"original": 0, "future": 1.0}).assign(chunk, 0, RelabelContext.from_lengths([2, 3]))
    assert rows.external is None and np.all(rows.goal_episode >= 0)
