"""Mutation tests of goal heads in a built set: a slip planted in the head builder is caught by
``goalkit verify`` alone (its replay shares the slip; the audit, goalkit/audit/headaudit.py,
does not import the builder). Laws restated by the audit: subgoals at min(t + k, T) (Park et al.,
2023, HIQL, NeurIPS), the geometric offset law P(K = k) = (1 - gamma) gamma**(k-1) on {1, 2, ...}
clipped at the episode's end or renormalised within it, and the value-goal shares 0.2 / 0.5 / 0.3
(same paper; from memory).
"""

from __future__ import annotations

import json
from pathlib import Path

import h5py
import pytest

from conftest import build_and_verify_mutants, copy_package, run_goalkit, selected_params, write_recipe

HEADS = """
[heads.value]
weights = {current = 0.2, geometric = 0.5, random = 0.3}
gamma = 0.95

[heads.policy]
weights = {geometric = 1}
gamma = 0.9
past_end = "renormalise"

[heads.subgoal]
weights = {subgoal = 1}
steps = 25
"""

#: name -> (text in goalkit/pipeline/headcols.py, replacement, text expected in verify's output)
MUTANTS = {
    "subgoal one step short: min(t + k - 1, T)": (
        "j = np.where(src == _SUB, np.minimum(t + k_sub, T), j)",
        "j = np.where(src == _SUB, np.minimum(t + k_sub - 1, T), j)", "row rule 'head subgoal: subgoal'"),
    "geometric clipped at T - 1": (
        "j = np.where(src == _GEO, t + np.minimum(np.maximum(k, 1.0), room).astype(np.int64), j)",
        "j = np.where(src == _GEO, t + np.minimum(np.maximum(k, 1.0), np.maximum(room - 1, 1)).astype(np.int64), j)",
        "head value: geometric offset"),
    "renormalised within T - t - 1": (
        "q = np.where(renorm, u * -np.expm1(room * np.log(gamma)), u)",
        "q = np.where(renorm, u * -np.expm1((room - 1) * np.log(gamma)), u)", "head policy: geometric"),
    "heads share one draw (slot ignored)": (
        "slot = np.arange(nh, dtype=np.int64)[:, None]", "slot = np.zeros((nh, 1), dtype=np.int64)",
        "independent draws"),
    "value shares in reverse order": (
        "out[h] = codes[np.searchsorted(cum, u[h], side=\"right\")]",
        "out[h] = codes[::-1][np.searchsorted(cum, u[h], side=\"right\")]", "head value: share of"),
}


def heads_recipe(folder: Path) -> Path:
    path = write_recipe(folder, "recipe-heads.toml")
    text = path.read_text().replace("goals_per_transition = 4", "goals_per_transition = 1")
    text = text.replace('chunk_rows = 4096', 'chunk_rows = 4096\ngoals = "heads"').replace('path = "set.h5"',
                                                                                           'path = "heads.h5"')
    path.write_text(text + HEADS)
    return path


@pytest.fixture(scope="module")
def correct(demo_logs, tmp_path_factory):
    root = tmp_path_factory.mktemp("heads-correct")
    package = copy_package(root / "pkg")
    recipe = heads_recipe(demo_logs)
    out = root / "heads.h5"
    done = run_goalkit(package, root, "build", recipe, "--out", out, "--quiet")
    assert done.returncode == 0, done.stderr
    return recipe, out, package


def _manifest(path: Path) -> dict:
    with h5py.File(path, "r") as f:
        return json.loads(f.attrs["manifest"])


def test_unmutated_head_set_passes_verify(correct):
    _, out, package = correct
    done = run_goalkit(package, out.parent, "verify", out, "--quiet", "--json")
    assert done.returncode == 0, done.stdout[-3000:] + done.stderr[-2000:]
    report = json.loads(done.stdout)
    names = [c["name"] for c in report["checked"]["audit"]["checks"]]
    assert report["ok"] and sum(n.startswith("head ") or n.startswith("law of head ") for n in names) >= 10


@pytest.fixture(scope="module")
def mutants(request, correct, tmp_path_factory):
    """Every selected head mutant built and verified from its own package copy, two at a time."""
    recipe = correct[0]
    jobs = {name: ([("pipeline/headcols.py", *MUTANTS[name][:2])], recipe)
            for name in selected_params(request, "name")}
    return build_and_verify_mutants(jobs, tmp_path_factory.mktemp("head-mutants"))


@pytest.mark.parametrize("name", list(MUTANTS))
def test_verify_alone_catches_the_head_mutant(name, correct, mutants):
    expected = MUTANTS[name][2]
    _, good, _ = correct
    got = mutants[name]
    assert got["error"] is None, got["error"]
    assert got["build"].returncode == 0, got["build"].stderr
    assert _manifest(got["out"]) != _manifest(good)   # the slip really changes the set
    done = got["verify"]
    assert done.returncode == 1, done.stdout[-3000:]
    assert "differs from what the recipe and seed produce" not in done.stdout   # the replay shares the slip
    audit = [line for line in done.stdout.splitlines() if line.startswith("  - audit: ")]
    assert audit and any(expected in line for line in audit), done.stdout[-3000:]
