"""benchmarks/bench_grouped.py: the paired speed-ups take each round against its own baseline.

A worked example with invented seconds (unit test of the benchmark's arithmetic): two rounds on
a host that ran 25 % slower in the second. The per-round ratio is the mean of the round's two
one-CPU runs over the case's seconds; the reported figure is the median over rounds, with the
two middle values averaged for an even count (Python's ``statistics.median``, as in any
statistics text).
"""

import importlib.util
import json
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
spec = importlib.util.spec_from_file_location("bench_grouped", ROOT / "benchmarks" / "bench_grouped.py")
bench = importlib.util.module_from_spec(spec)
sys.modules.setdefault("bench_grouped", bench)
spec.loader.exec_module(bench)


def test_each_round_is_taken_against_the_runs_that_bracket_it():
    rounds = [{"build-1cpu": [6.0, 6.4], "dask-2": [3.9]},
              {"build-1cpu": [7.5, 8.0], "dask-2": [4.9]}]
    paired, per_round = bench.paired_ratios(rounds, ["dask-2"])
    assert per_round["dask-2"] == pytest.approx([6.2 / 3.9, 7.75 / 4.9])
    assert paired == {"paired_dask_2_speed_over_1cpu_wall": pytest.approx((6.2 / 3.9 + 7.75 / 4.9) / 2)}
    # the ratio of medians mixes the rounds' speeds: the slow round's baseline against the fast
    # round's Dask run (upper middle of 4 baselines 7.5; upper of 2 Dask runs 4.9) reads otherwise
    assert 7.5 / 4.9 < min(per_round["dask-2"])


def test_the_median_over_rounds_ignores_one_disturbed_round():
    rounds = [{"build-1cpu": [6.0, 6.0], "w": [3.0]}, {"build-1cpu": [6.0, 6.0], "w": [6.0]},
              {"build-1cpu": [6.0, 6.0], "w": [3.75]}]
    paired, per_round = bench.paired_ratios(rounds, ["w"])
    assert per_round["w"] == pytest.approx([2.0, 1.0, 1.6])
    assert paired["paired_w_speed_over_1cpu_wall"] == pytest.approx(1.6)


def test_pooled_rounds_take_the_median_over_every_run(tmp_path):
    # benchmarks/tools/pool_rounds.py: two invented result files, 3 and 2 rounds of one size
    spec = importlib.util.spec_from_file_location("pool_rounds", ROOT / "benchmarks" / "tools" / "pool_rounds.py")
    pool_rounds = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(pool_rounds)

    a, b = tmp_path / "a.json", tmp_path / "b.json"
    a.write_text(json.dumps({"sizes": {"200k": {"per_round_speed_over_1cpu": {"dask-2": [1.5, 1.7, 1.3]}}}}))
    b.write_text(json.dumps({"sizes": {"200k": {"per_round_speed_over_1cpu": {"dask-2": [1.8, 1.6]}},
                                       "1M": {"per_round_speed_over_1cpu": {"dask-2": [1.9]}}}}))
    got = pool_rounds.pool([a, b])
    assert got["200k"]["dask-2"] == {"rounds": 5, "median": 1.6, "min": 1.3, "max": 1.8}
    assert got["1M"]["dask-2"]["median"] == 1.9
