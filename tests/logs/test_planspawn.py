"""Planning a grouped log with a helper process (goalkit/logs/planspawn.py, planhelper.py).

Reference: the serial planning of the same log in this process (the helper only shares the
work; metas, kept episodes and every error must be the serial ones).

Every helper test runs twice: with a fixed split (``split``: the helper plans groups 6.., as
when no shared frontier can be made) and with the two planners meeting where they meet
(``meet``, goalkit/logs/frontier.py): batches of 3 groups, and this process waits until the
helper has claimed down to group 6 before it plans, so that the helper plans several batches
from the last group down and the meeting point varies from run to run.
"""

from __future__ import annotations

import os
import time

import h5py
import numpy as np
import pytest
from logs_testdata import make_episodes, write_grouped, write_per_file

from goalkit.errors import LogError
from goalkit.logs import frontier as frontier_mod
from goalkit.logs import open_logs, planspawn


def waiting_until_the_helper_reaches(low: int):
    """A plan_upwards that first waits until the helper has claimed down to ``low`` (or its
    claim has not moved for half a second: it died)."""
    real = frontier_mod.plan_upwards

    def waiting(frontier, start, plan):
        seen, since = frontier.high(), time.monotonic()
        while frontier.high() > low and time.monotonic() - since < 0.5:
            if frontier.high() != seen:
                seen, since = frontier.high(), time.monotonic()
            time.sleep(0.001)
        return real(frontier, start, plan)

    return waiting


class Started(list):
    """The splits start_helper was called with; ``mode`` is ``"split"`` or ``"meet"``."""

    mode = ""


def both_ways(monkeypatch, mode: str, module: str) -> None:
    if mode == "split":
        monkeypatch.setattr(frontier_mod.Frontier, "create", classmethod(lambda cls, total: None))
    else:
        monkeypatch.setattr(frontier_mod, "BATCH", 3)
        monkeypatch.setattr(f"goalkit.logs.{module}.plan_upwards", waiting_until_the_helper_reaches(6))


@pytest.fixture(params=["split", "meet"])
def helper_on(monkeypatch, request):
    """A helper for logs of a few groups: it plans groups 6.. of 16 (see helper_split), or meets
    this process (see the module text)."""
    monkeypatch.setattr(planspawn, "MIN_GROUPS", 4)
    monkeypatch.setattr(planspawn, "cpus", lambda: 2)
    monkeypatch.setattr(planspawn, "helper_split", lambda total, skip=False, **kw: 6 if total >= 4 and not skip else None)
    both_ways(monkeypatch, request.param, "grouped")
    started = Started()
    started.mode = request.param
    real = planspawn.start_helper

    def counted(source, split, *groups, **kw):
        started.append(split)
        return real(source, split, *groups, **kw)

    monkeypatch.setattr("goalkit.logs.grouped.start_helper", counted)
    monkeypatch.setattr("goalkit.logs.grouped.helper_split", planspawn.helper_split)
    return started


def dying_helper(log):
    """A start_helper whose helper dies before answering (``"killed"`` appended to ``log``); with
    a frontier, after it has claimed its first batch."""
    real = planspawn.start_helper

    def dead(source, split, *groups, frontier=None):
        helper = real(source, split, *groups, frontier=frontier)
        if frontier is not None:
            total = frontier.high()
            deadline = time.monotonic() + 30
            while frontier.high() == total and time.monotonic() < deadline:
                time.sleep(0.0005)
            assert frontier.high() < total
        helper.proc.kill()
        helper.proc.wait()
        log.append("killed")
        return helper

    return dead


def serial(path, table, monkeypatch):
    monkeypatch.setattr("goalkit.logs.grouped.helper_split", lambda total, skip=False, **kw: None)
    return open_logs(path, table)


def test_helper_gives_the_serial_plan(tmp_path, helper_on, monkeypatch):
    eps = make_episodes([3, 1, 5, 2, 4, 6, 2, 3, 1, 4, 5, 2, 3, 2, 1, 4], seed=11)
    table = write_grouped(tmp_path / "g.h5", eps, fields=True)
    answers = []

    def finish(helper, **kw):
        answers.append(planspawn.finish_helper(helper, **kw))
        return answers[-1]

    monkeypatch.setattr("goalkit.logs.grouped.finish_helper", finish)
    shared = open_logs(tmp_path / "g.h5", table)
    first = answers[0]["start"]
    assert helper_on == [6] and len(answers[0]["metas"]) == 16 - first
    assert first == 6 if helper_on.mode == "split" else first <= 6   # the helper planned first..15
    ref = serial(tmp_path / "g.h5", table, monkeypatch)
    assert shared.metas == ref.metas and shared.key_dtypes == ref.key_dtypes
    np.testing.assert_array_equal(shared.lengths, [len(e["act"]) for e in eps])
    np.testing.assert_array_equal(shared.read(0, 16).observations, ref.read(0, 16).observations)


@pytest.mark.parametrize("seed, first, second, key", [
    (12, 2, 9, "rew"),     # episode 9 (helper's part) reuses episode 2's (this process's part)
    # both in the helper's part: meeting this process, the helper plans from the last group
    # down, so it reaches the shared dataset from episode 12 before episode 9; the error must
    # still be the serial one, on episode 12
    (19, 9, 12, "act"),
])
def test_dataset_shared_by_two_episodes_is_refused_as_in_serial(tmp_path, helper_on, monkeypatch, seed, first,
                                                                 second, key):
    eps = make_episodes([3] * 16, seed=seed)
    table = write_grouped(tmp_path / "g.h5", eps)
    with h5py.File(tmp_path / "g.h5", "a") as f:
        del f[f"runs/ep{second}/{key}"]
        f[f"runs/ep{second}/{key}"] = f[f"runs/ep{first}/{key}"]
    with pytest.raises(LogError) as err:
        open_logs(tmp_path / "g.h5", table)
    assert helper_on == [6]
    with pytest.raises(LogError) as ref:
        serial(tmp_path / "g.h5", table, monkeypatch)
    assert str(err.value) == str(ref.value)
    assert err.value.episode == second and f"same dataset as key runs/ep{first}/{key} of episode {first}" in str(err.value)


def test_problem_in_the_helpers_part_is_named_as_in_serial(tmp_path, helper_on, monkeypatch):
    eps = make_episodes([3] * 16, seed=13)
    table = write_grouped(tmp_path / "g.h5", eps)
    with h5py.File(tmp_path / "g.h5", "a") as f:
        del f["runs/ep11/rew"]
        f["runs/ep11/rew"] = np.zeros(5, np.float32)        # 5 rewards for 3 actions
    with pytest.raises(LogError) as err:
        open_logs(tmp_path / "g.h5", table)
    with pytest.raises(LogError) as ref:
        serial(tmp_path / "g.h5", table, monkeypatch)
    assert str(err.value) == str(ref.value) and err.value.episode == 11


def test_a_helper_that_fails_leaves_the_plan_to_this_process(tmp_path, helper_on, monkeypatch):
    eps = make_episodes([2] * 16, seed=14)
    table = write_grouped(tmp_path / "g.h5", eps)
    dead = dying_helper(helper_on)
    monkeypatch.setattr("goalkit.logs.grouped.start_helper", dead)
    src = open_logs(tmp_path / "g.h5", table)
    assert helper_on == ["killed"]
    monkeypatch.undo()
    ref = serial(tmp_path / "g.h5", table, monkeypatch)
    assert src.metas == ref.metas


def test_split_leaves_small_logs_and_one_cpu_alone(monkeypatch):
    monkeypatch.setattr(planspawn, "cpus", lambda: 2)
    assert planspawn.helper_split(planspawn.MIN_GROUPS - 1) is None
    assert planspawn.helper_split(21_000, skip_bad_episodes=True) is None
    split = planspawn.helper_split(21_000)
    assert 21_000 // 2 < split < 21_000                  # this process takes the larger part
    monkeypatch.setattr(planspawn, "cpus", lambda: 1)
    assert planspawn.helper_split(21_000) is None


@pytest.fixture(params=["split", "meet"])
def per_file_helper(monkeypatch, request):
    """A helper for per-file folders of a few files: it plans files 6.. of 16, or meets this
    process (see the module text)."""
    both_ways(monkeypatch, request.param, "perfile")
    started = Started()
    started.mode = request.param
    real = planspawn.start_helper

    def counted(source, split, **kw):
        started.append(split)
        return real(source, split, **kw)

    monkeypatch.setattr("goalkit.logs.perfile.start_helper", counted)
    monkeypatch.setattr("goalkit.logs.perfile.helper_split",
                        lambda total, skip=False, seconds_per_item=0: 6 if total >= 4 and not skip else None)
    return started


def serial_per_file(path, table, monkeypatch):
    monkeypatch.setattr("goalkit.logs.perfile.helper_split", lambda total, skip=False, seconds_per_item=0: None)
    return open_logs(path, table)


def test_per_file_helper_gives_the_serial_plan(tmp_path, per_file_helper, monkeypatch):
    eps = make_episodes([3, 1, 5, 2, 4, 6, 2, 3, 1, 4, 5, 2, 3, 2, 1, 4], seed=15)
    table = write_per_file(tmp_path / "eps", eps)
    shared = open_logs(tmp_path / "eps", table)
    assert per_file_helper == [6]
    ref = serial_per_file(tmp_path / "eps", table, monkeypatch)
    assert shared.metas == ref.metas
    np.testing.assert_array_equal(shared.lengths, [len(e["act"]) for e in eps])
    np.testing.assert_array_equal(shared.read(0, 16).observations, ref.read(0, 16).observations)


@pytest.mark.parametrize("damage", ["episode", "file"])
def test_per_file_problem_in_the_helpers_part_is_named_as_in_serial(tmp_path, per_file_helper, monkeypatch,
                                                                    damage):
    eps = make_episodes([3] * 16, seed=16)
    table = write_per_file(tmp_path / "eps", eps)
    if damage == "episode":                                    # 5 rewards for 3 actions
        with np.load(tmp_path / "eps" / "ep11.npz") as z:
            arrays = dict(z)
        arrays["rew"] = np.zeros(5, np.float32)
        np.savez(tmp_path / "eps" / "ep11.npz", **arrays)
    else:                                                      # not a zip archive at all
        (tmp_path / "eps" / "ep11.npz").write_bytes(b"not an archive")
    with pytest.raises(LogError) as err:
        open_logs(tmp_path / "eps", table)
    assert per_file_helper == [6]
    with pytest.raises(LogError) as ref:
        serial_per_file(tmp_path / "eps", table, monkeypatch)
    assert str(err.value) == str(ref.value) and "ep11.npz" in str(err.value)


def test_per_file_skipped_episodes_are_the_serial_ones(tmp_path, per_file_helper, monkeypatch):
    """With skip_bad_episodes (the helper is forced on here; the real split leaves it off), the
    episodes kept and the reasons given for the skipped ones are the serial ones."""
    eps = make_episodes([3] * 16, seed=17)
    table = write_per_file(tmp_path / "eps", eps)
    for bad in ("ep2.npz", "ep9.npz", "ep13.npz"):
        with np.load(tmp_path / "eps" / bad) as z:
            arrays = dict(z)
        arrays["rew"] = np.zeros(7, np.float32)
        np.savez(tmp_path / "eps" / bad, **arrays)
    monkeypatch.setattr("goalkit.logs.perfile.helper_split",
                        lambda total, skip=False, seconds_per_item=0: 6 if total >= 4 else None)
    shared = open_logs(tmp_path / "eps", table, skip_bad_episodes=True)
    assert per_file_helper == [6]
    monkeypatch.setattr("goalkit.logs.perfile.helper_split", lambda total, skip=False, seconds_per_item=0: None)
    ref = open_logs(tmp_path / "eps", table, skip_bad_episodes=True)
    assert [e for e, _ in shared.skipped] == [2, 9, 13]
    assert [(e, str(r)) for e, r in shared.skipped] == [(e, str(r)) for e, r in ref.skipped]
    np.testing.assert_array_equal(shared.episode_ids, ref.episode_ids)


def test_per_file_helper_that_fails_leaves_the_plan_to_this_process(tmp_path, per_file_helper, monkeypatch):
    eps = make_episodes([3] * 16, seed=18)
    table = write_per_file(tmp_path / "eps", eps)
    with np.load(tmp_path / "eps" / "ep12.npz") as z:
        arrays = dict(z)
    arrays["rew"] = np.zeros(5, np.float32)
    np.savez(tmp_path / "eps" / "ep12.npz", **arrays)
    dead = dying_helper(per_file_helper)
    monkeypatch.setattr("goalkit.logs.perfile.start_helper", dead)
    answers = []
    real_finish = planspawn.finish_helper
    monkeypatch.setattr("goalkit.logs.perfile.finish_helper",
                        lambda helper, expect, **kw: answers.append(real_finish(helper, expect, **kw)) or answers[-1])
    with pytest.raises(LogError) as err:
        open_logs(tmp_path / "eps", table)
    assert per_file_helper == ["killed"] and answers == [None]      # no answer: planned here
    assert err.value.episode == 12 and "episode 12" in str(err.value)


def test_the_helper_plans_the_groups_it_is_sent_without_matching_them_again(tmp_path, monkeypatch):
    # the request carries the paths of the helper's groups and the identity of the file they were
    # matched in; the helper plans exactly those (the same metas as the serial plan) and refuses a
    # request for another file or whose paths do not add up (the caller then plans them itself)
    import os

    from goalkit.logs import grouped

    eps = make_episodes([3, 1, 5, 2, 4, 6, 2, 3, 1, 4], seed=5)
    table = write_grouped(tmp_path / "g.h5", eps, fields=True)
    ref = serial(tmp_path / "g.h5", table, monkeypatch)
    request = ref.plan_request(4)
    assert request["groups"] == ref.groups[4:] and request["total"] == 10

    def no_match(*args, **kwargs):
        raise AssertionError("the helper matched the groups again")

    monkeypatch.setattr(grouped, "match_groups", no_match)
    answer = grouped.GroupedSource.plan_part(request)
    assert answer["metas"] == ref.metas[4:]
    with pytest.raises(ValueError, match="add up"):
        grouped.GroupedSource.plan_part({**request, "groups": request["groups"][1:]})
    with pytest.raises(ValueError, match="add up"):
        grouped.GroupedSource.plan_part({**request, "groups": request["groups"][::-1]})
    st = os.stat(tmp_path / "g.h5")
    os.utime(tmp_path / "g.h5", ns=(st.st_atime_ns, st.st_mtime_ns + 1_000_000_000))   # the file changed since
    with pytest.raises(ValueError, match="not the file"):
        grouped.GroupedSource.plan_part(request)


def test_the_helper_starts_on_the_listed_groups_before_they_are_checked(tmp_path, helper_on, monkeypatch):
    # the checks of the episode names (a link and an object-header look-up each) run in this
    # process while the helper already plans its part of the names as listed
    from goalkit.logs import grouped

    eps = make_episodes([3, 1, 5, 2, 4, 6, 2, 3, 1, 4, 5, 2, 3, 2, 1, 4], seed=11)
    table = write_grouped(tmp_path / "g.h5", eps, fields=True)
    events = []
    real_match, real_start = grouped.match_groups, grouped.start_helper

    def match(*args, checked=True, **kwargs):
        events.append(("match", checked))
        return real_match(*args, checked=checked, **kwargs)

    def start(source, split, *groups, **kw):
        events.append(("helper", split))
        return real_start(source, split, *groups, **kw)

    monkeypatch.setattr(grouped, "match_groups", match)
    monkeypatch.setattr(grouped, "start_helper", start)
    shared = open_logs(tmp_path / "g.h5", table)
    assert events == [("match", False), ("helper", 6), ("match", True)]
    ref = serial(tmp_path / "g.h5", table, monkeypatch)
    assert shared.metas == ref.metas and shared.groups == ref.groups


def test_an_early_helper_given_a_name_the_checks_leave_out_is_not_used(tmp_path, helper_on, monkeypatch):
    # a dataset whose name matches the episode pattern is listed but is not an episode group:
    # the early helper planned other groups than the checked ones, so a fresh one is asked
    eps = make_episodes([3, 1, 5, 2, 4, 6, 2, 3, 1, 4, 5, 2, 3, 2, 1, 4], seed=11)
    table = write_grouped(tmp_path / "g.h5", eps, fields=True)
    with h5py.File(tmp_path / "g.h5", "r+") as f:
        f["runs/ep10x"] = np.arange(3.0)                 # between ep10 and ep11 in natural order
    shared = open_logs(tmp_path / "g.h5", table)
    assert helper_on == [6, 6]                          # the early helper, then one for the checked groups
    ref = serial(tmp_path / "g.h5", table, monkeypatch)
    assert "runs/ep10x" not in shared.groups and shared.groups == ref.groups
    assert shared.metas == ref.metas
    np.testing.assert_array_equal(shared.read(0, 16).observations, ref.read(0, 16).observations)


def test_a_head_start_moves_groups_to_the_helper(monkeypatch):
    # the caller's part shrinks by the head start's worth of groups, never below a tenth
    monkeypatch.setattr(planspawn, "cpus", lambda: 2)
    total = 21_000
    plain = planspawn.helper_split(total)
    ahead = planspawn.helper_split(total, head_start=0.2)
    assert plain - ahead == pytest.approx(0.2 / planspawn.SECONDS_PER_GROUP / 2, abs=2)
    assert planspawn.helper_split(total, head_start=100.0) == total // 10


def overlapping(upto: int):
    """A plan_upwards that lets the helper plan every episode first, then plans ``0 .. upto``
    itself: the two parts overlap on ``0 .. upto`` (what a race at the meeting point does, on
    a batch), and the caller must keep its own metas there."""
    def plan_first(frontier, start, plan):
        deadline = time.monotonic() + 30
        while frontier.high() > 0 and time.monotonic() < deadline:
            time.sleep(0.001)
        assert frontier.high() == 0
        plan(start, upto)
        return upto

    return plan_first


@pytest.mark.parametrize("shape", ["grouped", "per-file"])
def test_where_the_parts_overlap_this_process_keeps_its_own(tmp_path, monkeypatch, shape):
    monkeypatch.setattr(planspawn, "cpus", lambda: 2)
    monkeypatch.setattr(frontier_mod, "BATCH", 3)
    module = "grouped" if shape == "grouped" else "perfile"
    monkeypatch.setattr(f"goalkit.logs.{module}.helper_split", lambda total, skip=False, **kw: 6)
    monkeypatch.setattr(f"goalkit.logs.{module}.plan_upwards", overlapping(10))
    answers = []
    real_finish = planspawn.finish_helper
    monkeypatch.setattr(f"goalkit.logs.{module}.finish_helper",
                        lambda helper, **kw: answers.append(real_finish(helper, **kw)) or answers[-1])
    eps = make_episodes([3, 1, 5, 2, 4, 6, 2, 3, 1, 4, 5, 2, 3, 2, 1, 4], seed=21)
    if shape == "grouped":
        table = write_grouped(tmp_path / "g", eps, fields=True)
        path = tmp_path / "g"
    else:
        table = write_per_file(tmp_path / "eps", eps)
        path = tmp_path / "eps"
    shared = open_logs(path, table)
    assert answers[0]["start"] == 0 and len(answers[0]["metas"]) == 16       # the helper planned all
    monkeypatch.setattr(f"goalkit.logs.{module}.helper_split", lambda total, skip=False, **kw: None)
    ref = open_logs(path, table)
    assert shared.metas == ref.metas and len(shared.metas) == 16
    np.testing.assert_array_equal(shared.read(0, 16).observations, ref.read(0, 16).observations)


def _frontier_files() -> set:
    folder = frontier_mod._folder()
    return {n for n in os.listdir(folder) if n.startswith(".goalkit-frontier-")}


@pytest.mark.parametrize("broken", [False, True])
def test_no_frontier_file_is_left_behind(tmp_path, helper_on, monkeypatch, broken):
    # the shared file of the claims goes with the planning, whether it ends well or not (here a
    # dangling soft link among the episode names fails the checked match after the early
    # helper was started)
    eps = make_episodes([3] * 16, seed=22)
    table = write_grouped(tmp_path / "g.h5", eps)
    if broken:
        with h5py.File(tmp_path / "g.h5", "a") as f:
            f["runs/ep7x"] = h5py.SoftLink("/runs/nowhere")
    before = _frontier_files()
    if broken:
        with pytest.raises(LogError, match="ep7x"):
            open_logs(tmp_path / "g.h5", table)
    else:
        open_logs(tmp_path / "g.h5", table)
    assert helper_on == [6]
    assert _frontier_files() <= before


@pytest.mark.parametrize("shape", ["grouped", "per-file"])
def test_a_stand_in_left_nothing_to_plan_is_not_waited_for(tmp_path, monkeypatch, shape):
    # A build's worker standing in for the spare (a PoolSpare) whose task never starts, as on a
    # cluster busy with other work: this process plans every group, and returns at once instead
    # of waiting for an answer that has nothing in it; the queued task is cancelled.
    from concurrent.futures import Future
    from types import SimpleNamespace

    from goalkit.logs import spare
    from goalkit.pipeline.poolspare import PoolSpare

    module = "grouped" if shape == "grouped" else "perfile"
    monkeypatch.setattr(planspawn, "cpus", lambda: 2)
    monkeypatch.setattr(f"goalkit.logs.{module}.helper_split", lambda total, skip=False, **kw: 6)
    queued = []
    runner = SimpleNamespace(broken=False, submit=lambda fn, *args: queued.append(Future()) or queued[-1])
    eps = make_episodes([3, 1, 5, 2, 4, 6, 2, 3, 1, 4, 5, 2, 3, 2, 1, 4], seed=23)
    path = tmp_path / ("g.h5" if shape == "grouped" else "eps")
    table = write_grouped(path, eps, fields=True) if shape == "grouped" else write_per_file(path, eps)
    result = {}

    def plan():
        with spare.scope([], early=False):
            spare.give_back(PoolSpare(runner, every=0.05))
            result["log"] = open_logs(path, table)

    import threading
    worker = threading.Thread(target=plan, daemon=True)
    worker.start()
    worker.join(timeout=30)
    assert not worker.is_alive(), "the planning waited for a helper that had nothing to plan"
    assert len(queued) == 1 and queued[0].cancelled()
    monkeypatch.setattr(f"goalkit.logs.{module}.helper_split", lambda total, skip=False, **kw: None)
    ref = open_logs(path, table)
    assert result["log"].metas == ref.metas and len(ref.metas) == 16
