"""The sharded build's workers plan a share of the log (goalkit/pipeline/poolhelper.py).

Reference: the single-process build of the same recipe (its SHA-256, FIPS 180-4, over the whole
file, as in test_scale_identity.py), and the answers of plain Python calls: the pool only shares
the planning, every byte of the set and every error stay the serial ones.
"""

import operator
import os
import time

import pytest

from goalkit.logs import spare
from goalkit.pipeline import poolhelper
from goalkit.pipeline.build import build
from goalkit.pipeline.poolhelper import PoolHelper
from goalkit.pipeline.recipe import load_recipe
from goalkit.pipeline.workers import LocalRunner, warm_up

from conftest import sha256


def test_pieces_come_back_in_order_failures_as_none_and_the_runner_is_left_running():
    runner = LocalRunner(2)
    try:
        runner.launch()
        helper = PoolHelper(runner, time.monotonic())
        assert helper.alive
        assert helper.send({"call": operator.add, "each": [(1, 2), (30, 4), ("a", "b")]})
        assert [helper.receive(), helper.receive(), helper.receive()] == [3, 34, "ab"]
        assert helper.receive() is None                      # nothing asked for
        assert helper.send({"call": operator.truediv, "each": [(1, 0), (9, 3)]})
        assert helper.receive() is None and helper.receive() == 3.0    # a failed piece: None
        assert helper.send({"call": operator.mul, "each": [(6, 7)]})
        helper.close()
        assert not helper.alive and helper.receive() is None
        assert runner.submit(warm_up).result(timeout=60) != os.getpid()   # the pool still works
    finally:
        runner.close()


def test_a_worker_dying_on_a_piece_makes_it_none_at_once():
    runner = LocalRunner(1)
    try:
        runner.launch()
        helper = PoolHelper(runner, time.monotonic())
        assert helper.send({"call": os._exit, "each": [(3,)]})
        started = time.monotonic()
        assert helper.receive() is None
        assert time.monotonic() - started < 15
    finally:
        runner.close()


def test_nothing_is_lent_outside_a_scope_or_to_a_runner_that_cannot_take_work():
    runner = LocalRunner(1)                                  # not launched: no pool yet
    with spare.scope(early=False):
        poolhelper.lend(runner)
        poolhelper.lend(None)
        assert spare.waiting_for() is None
    runner.launch()
    try:
        poolhelper.lend(runner)                              # no scope: not kept
        assert spare.waiting_for() is None
        with spare.scope(early=False):
            poolhelper.lend(runner)
            assert spare.waiting_for() is not None
            assert isinstance(spare.take(), PoolHelper)
    finally:
        runner.close()


def test_a_sharded_build_plans_a_share_on_its_pool_and_gives_the_same_bytes(gantry, reference, tmp_path,
                                                                            monkeypatch):
    # the 240-group demo log is below the helper's threshold: share it as a large log would be
    monkeypatch.setattr("goalkit.logs.grouped.helper_split", lambda total, skip=False: 100 if not skip else None)
    answers = []
    real = PoolHelper.receive

    def receive(self):
        answers.append(real(self))
        return answers[-1]

    monkeypatch.setattr(PoolHelper, "receive", receive)
    _, ref_digest = reference
    out = tmp_path / "scale-goals.h5"
    recipe = load_recipe(gantry / "scale-recipe.toml").with_overrides(out=out)
    result = build(recipe, workers=2, max_rows_per_chunk=4000, card=False)
    assert sha256(out) == ref_digest
    assert result.shards["computed"] > 2
    assert len(answers) == 1 and len(answers[0]["metas"]) == 240 - 100     # groups 100.. planned there


def test_a_dask_build_plans_a_share_on_its_workers(gantry, reference, tmp_path, monkeypatch):
    distributed = pytest.importorskip("distributed")
    monkeypatch.setattr("goalkit.logs.grouped.helper_split", lambda total, skip=False: 90 if not skip else None)
    answers = []
    real = PoolHelper.receive
    monkeypatch.setattr(PoolHelper, "receive", lambda self: answers.append(real(self)) or answers[-1])
    _, ref_digest = reference
    out = tmp_path / "scale-goals.h5"
    recipe = load_recipe(gantry / "scale-recipe.toml").with_overrides(out=out)
    with distributed.LocalCluster(processes=True, n_workers=2, threads_per_worker=1,
                                  dashboard_address=None) as cluster, distributed.Client(cluster) as client:
        client.wait_for_workers(2)
        build(recipe, client=client, max_rows_per_chunk=3000, card=False)
    assert sha256(out) == ref_digest
    assert len(answers) == 1 and len(answers[0]["metas"]) == 240 - 90
