"""One row schema: goalkit/rows.py against docs/dataset.md, the file format, the builder's rows,
GoalRows, the sampler and a built set's columns; one strategy table against the docs' code table."""

import dataclasses
import re
from pathlib import Path

import h5py
import numpy as np
import pytest

from goalkit.demo import make_demo
from goalkit.pipeline.build import build
from goalkit.pipeline.recipe import load_recipe
from goalkit.relabel import GoalRows, StrategyGoals, strategy_names
from goalkit.rows import (ALL_FIELDS, GOAL_ADDRESS, INDEX_FIELDS, MATERIAL_FIELDS, SCORE_COLUMNS, SPLIT_CODES,
                          SPLITS, TASK_REWARD_FIELD)
from goalkit.write import format as fmt
from goalkit.write.sampler import GoalSampler

DOC = Path(__file__).resolve().parents[2] / "docs" / "dataset.md"


def _table(heading_cells):
    """Rows of the markdown table of docs/dataset.md whose header is ``heading_cells``."""
    lines = DOC.read_text(encoding="utf-8").splitlines()
    head = "| " + " | ".join(heading_cells) + " |"
    start = lines.index(head) + 2
    rows = []
    for line in lines[start:]:
        if not line.startswith("|"):
            break
        rows.append([c.strip() for c in line.strip().strip("|").split(" | ")])
    return rows


def test_docs_column_table_is_the_schema():
    rows = _table(["column", "dtype", "shape", "meaning"])
    documented = {re.fullmatch(r"`(\w+)`", name).group(1): (dtype, shape, meaning)
                  for name, dtype, shape, meaning in rows}
    schema = {f.name: (f.dtype_text, f.shape_text, f.meaning) for f in ALL_FIELDS.values()}
    assert documented == schema
    assert len(documented) == 28   # 18 index columns, 4 materialised, task_reward, 2 end flags, source, goal_mask, graph_steps


def test_docs_strategy_table_is_the_strategy_table():
    rows = _table(["code", "name", "goal"])
    assert {int(code): name for code, name, _ in rows} == strategy_names()
    assert list(strategy_names()) == list(range(9))


def test_format_and_splits_come_from_the_schema():
    assert fmt.INDEX_COLUMNS == {f.name: (f.dtype, f.kind, f.meaning) for f in INDEX_FIELDS.values()}
    assert fmt.MATERIAL_COLUMNS == {f.name: (f.dtype, f.kind, f.meaning) for f in MATERIAL_FIELDS.values()}
    assert fmt.TASK_REWARD_COLUMN == ("task_reward", "float32", TASK_REWARD_FIELD.meaning)
    assert fmt.SPLITS is SPLITS and fmt.SPLIT_CODES is SPLIT_CODES == {"train": 0, "validation": 1}
    assert fmt.column_names("materialised", True, ("termination", "time_limit"), True, True, True) == list(ALL_FIELDS)


def test_goal_rows_and_strategy_goals_carry_the_address_columns():
    goal_rows = {f.name for f in dataclasses.fields(GoalRows)}
    assert set(GOAL_ADDRESS) | {"slot", "strategy"} <= goal_rows
    # a strategy fills the address columns, except steps_to_goal's default (set by the mixture)
    assert {f.name for f in dataclasses.fields(StrategyGoals)} - {"external"} == set(GOAL_ADDRESS)
    for name in GOAL_ADDRESS + ("slot", "strategy"):
        assert name in INDEX_FIELDS


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    d = tmp_path_factory.mktemp("schema")
    make_demo(d, episodes=12, seed=2)
    return d


def test_a_built_set_and_the_sampler_use_the_schema(demo):
    recipe = load_recipe(demo / "gantry-recipe.toml")
    result = build(recipe)
    with h5py.File(result.path, "r") as f:
        for split in SPLITS:
            group = f[split]
            assert set(group) == set(INDEX_FIELDS) | set(MATERIAL_FIELDS) | {"task_reward"}
            for name, field in INDEX_FIELDS.items():
                if field.dtype not in ("goal", "obs", "act"):
                    assert group[name].dtype == np.dtype(field.dtype), name
            assert group["goal"].dtype == np.dtype(recipe.goal.dtype)
    batch = GoalSampler(recipe).batch(64, index=0)
    assert set(batch) <= set(ALL_FIELDS)
    assert set(SCORE_COLUMNS) <= set(batch)
    for name in SCORE_COLUMNS:
        assert batch[name].dtype == np.dtype(ALL_FIELDS[name].dtype)


def test_the_schema_module_states_no_rules_and_imports_nothing_of_goalkit():
    # goalkit/rows.py holds names, dtypes and meanings only: no strategy code and no rule, so it
    # is not on the audit's forbidden list (tests/audit/test_imports.py); the audit does not
    # import it either, and keeps its own statement of the rules.
    import ast
    import goalkit.rows as rows
    tree = ast.parse(Path(rows.__file__).read_text(encoding="utf-8"))
    imported = [n.module for n in ast.walk(tree) if isinstance(n, ast.ImportFrom)]
    imported += [a.name for n in ast.walk(tree) if isinstance(n, ast.Import) for a in n.names]
    assert [m for m in imported if m and m.startswith("goalkit")] == []
    assert not any(name in vars(rows) for name in ("CODES", "STRATEGIES", "score"))
