"""Task ids known from opening a log: the same, episode by episode, as those its reads give.

A build whose ``[mask]`` table names tasks, and tune's labelled pairs with such a table, need
every kept episode's task id before anything else; readers that checked the ids while opening
the log hand them over without a second pass (``known_task_ids``). Checked against the read
path and against the episodes written (invented unit-test data, logs_testdata.py), with
skipped episodes, several files and sources, and a sample of episodes.
"""

from __future__ import annotations

import h5py
import numpy as np

from goalkit.archive import SourceSpec
from goalkit.logs import open_logs
from goalkit.logs.episodes import kept_task_ids, read_task_ids
from goalkit.logs.layout import parse_layout
from goalkit.logs.multi import open_sources
from goalkit.thresholds.sample import SampledSource
from logs_testdata import make_episodes, write_flat, write_grouped, write_per_file

LENGTHS = [3, 1, 7, 2, 5, 4, 1, 6]


def _tasks(eps, kept):
    return np.array([eps[i]["task"] for i in kept], dtype=np.int64)


def _assert_known(src, want):
    known = kept_task_ids(src, 5)
    assert hasattr(src, "known_task_ids")
    assert known.dtype == np.int64
    np.testing.assert_array_equal(known, want)
    np.testing.assert_array_equal(read_task_ids(src, 5), want)


def test_grouped_log_with_a_skipped_episode(tmp_path):
    eps = make_episodes(LENGTHS, seed=11)
    for i, e in enumerate(eps):
        e["task"] = 40 + (i * 7) % 5
    table = write_grouped(tmp_path / "g.h5", eps, task_as="array")
    with h5py.File(tmp_path / "g.h5", "r+") as f:
        del f["runs/ep2/act"]                     # episode 2 cannot be planned: skipped
    src = open_logs(tmp_path / "g.h5", table, skip_bad_episodes=True)
    assert src.episode_ids.tolist() == [0, 1, 3, 4, 5, 6, 7]
    _assert_known(src, _tasks(eps, [0, 1, 3, 4, 5, 6, 7]))


def test_flat_log_whose_task_changes_inside_an_episode_skips_it(tmp_path):
    eps = make_episodes(LENGTHS, seed=12)
    table = write_flat(tmp_path / "f.h5", eps, boundary="offsets")
    with h5py.File(tmp_path / "f.h5", "r+") as f:
        task = f["task"][:]
        task[int(np.sum(LENGTHS[:4])) + 2] += 1   # third step of episode 4
        f["task"][:] = task
    src = open_logs(tmp_path / "f.h5", table, skip_bad_episodes=True)
    assert 4 not in src.episode_ids.tolist() and len(src.episode_ids) == len(eps) - 1
    _assert_known(src, _tasks(eps, src.episode_ids.tolist()))


def test_several_files_and_sources_and_a_sample(tmp_path):
    eps = make_episodes(LENGTHS, seed=13)
    write_grouped(tmp_path / "a.h5", eps[:3], task_as="scalar")
    table = write_grouped(tmp_path / "b.h5", eps[3:5], task_as="scalar")
    per = write_per_file(tmp_path / "d", eps[5:])
    specs = [SourceSpec("bench", (str(tmp_path / "a.h5"), str(tmp_path / "b.h5")), parse_layout(table)),
             SourceSpec("trays", (str(tmp_path / "d"),), parse_layout(per), key="sources[1].path")]
    src = open_sources(specs, named=True)
    # the sources are laid out by their id bases; each one's files in the order given
    of_source = {0: _tasks(eps, range(5)), 1: _tasks(eps, range(5, 8))}
    codes = src.episode_sources.tolist()
    first_code = codes[0]
    by_source = np.concatenate([of_source[first_code], of_source[1 - first_code]])
    assert codes == [first_code] * len(of_source[first_code]) + [1 - first_code] * len(of_source[1 - first_code])
    _assert_known(src, by_source)
    sub = SampledSource(src, [1, 4, 6])
    known = kept_task_ids(sub, 5)
    np.testing.assert_array_equal(known, by_source[[1, 4, 6]])
    np.testing.assert_array_equal(read_task_ids(sub, 5), known)


def test_a_log_without_task_ids_has_none(tmp_path):
    eps = make_episodes([2, 3], seed=14)
    table = write_grouped(tmp_path / "g.h5", eps)
    del table["keys"]["task"]
    src = open_logs(tmp_path / "g.h5", table)
    assert kept_task_ids(src, 5) is None and read_task_ids(src, 5) is None
    flat = write_flat(tmp_path / "f.h5", eps)
    del flat["keys"]["task"]
    src = open_logs(tmp_path / "f.h5", flat)
    assert kept_task_ids(src, 5) is None and read_task_ids(src, 5) is None
