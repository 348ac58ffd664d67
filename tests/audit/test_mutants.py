"""Mutation tests: a slip planted in the builder's code is caught by ``goalkit verify`` alone.

Each mutant is a textual change to a copy of the goalkit package (relabelling, mixture, reward,
chunk scoring, split). ``build`` and ``verify`` both run from the mutated copy, so the slip
lives in the builder and in the replaying part of verify, as a real bug would; the replay then
agrees with the built set, and only the audit (goalkit/audit, left unmutated because it
imports none of the mutated modules; see test_imports.py) can notice. The rules the audit
checks are the documented ones: HER's final / future / episode strategies (Andrychowicz et
al. 2017, Hindsight Experience Replay, NeurIPS, section 3.3 and the strategies compared in
section 4.5, from memory) and docs/relabel.md, docs/reward.md.
"""

from __future__ import annotations

import json
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import h5py
import pytest

from conftest import build_and_verify_mutants, copy_package, run_goalkit, selected_params, write_recipe

#: name -> (file in the package, text, replacement, recipe variant, text expected in verify's output[,
#: further (file, text, replacement) changes of the same slip])
MUTANTS = {
    "future includes t (builder and verify's rule table)": (
        "relabel/strategies.py", 'rng.integers(seed, t + 1, length + 1, eid, t, slots, "goal")',
        'rng.integers(seed, t, length + 1, eid, t, slots, "goal")', "main", "row rule 'future'",
        ("relabel/strategies.py", "lambda r: r.same & (r.j > r.t) & (r.j <= r.T))",
         "lambda r: r.same & (r.j >= r.t) & (r.j <= r.T))")),
    "future excludes T": (
        "relabel/strategies.py", 'rng.integers(seed, t + 1, length + 1, eid, t, slots, "goal")',
        'rng.integers(seed, t + 1, length, eid, t, slots, "goal")', "main", "row rule 'future'"),
    "future slots share a draw": (
        "relabel/strategies.py", 'rng.integers(seed, t + 1, length + 1, eid, t, slots, "goal")',
        'rng.integers(seed, t + 1, length + 1, eid, t, 0, "goal")', "main", "check 'slot pairs: same goal step'"),
    "strategy slots share a draw": (
        "relabel/mixture.py", 'rng.uniform(seed, episode_ids, steps, slots, "strategy")',
        'rng.uniform(seed, episode_ids, steps, 0, "strategy")', "main", "check 'slot pairs: same strategy'"),
    "mixture weights reversed": (
        "relabel/mixture.py", "cum = np.cumsum([w for _, w in active])",
        "cum = np.cumsum([w for _, w in active][::-1])", "main", "check 'share of future'"),
    "final is s_(T-1)": (
        "relabel/strategies.py", "return StrategyGoals(eid, length.copy())",
        "return StrategyGoals(eid, length - 1)", "main", "row rule 'final'"),
    "episode excludes step 0": (
        "relabel/strategies.py", 'rng.integers(seed, 0, length + 1, eid, t, slots, "goal")',
        'rng.integers(seed, 1, length + 1, eid, t, slots, "goal")', "main",
        "check 'episode step: first value of the range'"),
    "geometric offset floor (no +1)": (
        "relabel/strategies.py", "k = np.ceil(np.log1p(-u) / log_g)", "k = np.floor(np.log1p(-u) / log_g)",
        "main", "check 'law of geometric offset'"),
    "other_episode may pick its own episode": (
        "relabel/strategies.py", "k = k + (k >= own)", "k = k + (k > own)", "main", "row rule 'other_episode'"),
    "steps_to_goal off by one": (
        "relabel/mixture.py", "steps_to_goal = np.where(same, goal_step - t, -1)",
        "steps_to_goal = np.where(same, goal_step - t - 1, -1)", "main", "row rule 'future'"),
    "strict threshold when inclusive": (
        "reward.py", "return d <= threshold if inclusive else d < threshold",
        "return d < threshold if inclusive else d < threshold", "exact", "row rule 'reached'"),
    "sparse-negative sign slip": (
        "reward.py", "return reached.astype(np.float32) - np.float32(1.0)",
        "return np.float32(1.0) - reached.astype(np.float32)", "main", "row rule 'reward'"),
    "terminal ignores end_on_reach": (
        "reward.py", "terminal = reached if rule.end_on_reach else np.zeros_like(reached)",
        "terminal = np.zeros_like(reached)", "main", "row rule 'terminal'"),
    "truncate conditions on K <= T - t - 1": (
        "relabel/strategies.py", "u = u * -np.expm1(room * log_g)", "u = u * -np.expm1((room - 1) * log_g)",
        "truncate", "check 'geometric offset: last value of the range'"),
    "split fraction inverted": (
        "pipeline/split.py", "return (u < validation).astype(np.int8)",
        "return (u < 1.0 - validation).astype(np.int8)", "main", "check 'split fraction'"),
}

RECIPES = {"main": {}, "exact": {"threshold": 0.0, "form": "sparse", "end_on_reach": "false"},
           "truncate": {"past_end": "truncate"}}


@pytest.fixture(scope="module")
def correct(demo_logs, tmp_path_factory):
    """The unmutated package copy and one correct build per recipe variant (built two at a time)."""
    root = tmp_path_factory.mktemp("correct")
    package = copy_package(root / "pkg")
    built = {}
    for name, opts in RECIPES.items():
        built[name] = (write_recipe(demo_logs, f"recipe-{name}.toml", **opts), root / f"{name}.h5")
    with ThreadPoolExecutor(max_workers=2) as pool:
        done = list(pool.map(lambda v: run_goalkit(package, root, "build", v[0], "--out", v[1], "--quiet"),
                             built.values()))
    for d in done:
        assert d.returncode == 0, d.stderr
    return package, built


@pytest.fixture(scope="module")
def mutants(request, correct, tmp_path_factory):
    """Every selected mutant built and verified from its own package copy, two at a time."""
    _, built = correct
    jobs = {}
    for name in selected_params(request, "name"):
        rel, old, new, variant, _, *more = MUTANTS[name]
        jobs[name] = ([(rel, old, new), *more], built[variant][0])
    return build_and_verify_mutants(jobs, tmp_path_factory.mktemp("mutants"))


def _manifest(path: Path) -> dict:
    with h5py.File(path, "r") as f:
        return json.loads(f.attrs["manifest"])


@pytest.mark.parametrize("variant", sorted(RECIPES))
def test_unmutated_copy_passes_verify(correct, variant):
    package, built = correct
    _, out = built[variant]
    done = run_goalkit(package, out.parent, "verify", out, "--quiet", "--json")
    assert done.returncode == 0, done.stdout[-3000:] + done.stderr[-2000:]
    report = json.loads(done.stdout)
    assert report["ok"] and report["checked"]["audit"]["ok"]
    assert len(report["checked"]["audit"]["checks"]) >= 15


@pytest.mark.parametrize("name", list(MUTANTS))
def test_verify_alone_catches_the_mutant(name, correct, mutants):
    _, _, _, variant, expected, *_ = MUTANTS[name]
    _, built = correct
    _, good = built[variant]
    got = mutants[name]
    assert got["error"] is None, got["error"]
    # the audit package copy is the unmutated one
    assert (got["package"] / "goalkit" / "audit" / "run.py").read_text() == (
        Path(__file__).resolve().parents[2] / "goalkit" / "audit" / "run.py").read_text()
    assert got["build"].returncode == 0, got["build"].stderr
    # the slip really changes the built set
    assert _manifest(got["out"]) != _manifest(good)
    done = got["verify"]
    assert done.returncode == 1, done.stdout[-3000:]
    assert "NOT consistent" in done.stdout
    # the replay agrees with the mutated builder; the audit names the slip (verify's own rule
    # table, the strategies' row rules, may catch it too when it is not part of the slip)
    failures = [line for line in done.stdout.splitlines() if line.startswith("  - ")]
    assert "differs from what the recipe and seed produce" not in done.stdout
    audit = [line for line in failures if line.startswith("  - audit: ")]
    assert audit and any(expected in line for line in audit), done.stdout[-3000:]
