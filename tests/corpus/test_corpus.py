"""The malformed-input corpus through the whole CLI (see corpus_cases.py and corpus_harness.py).

The default run takes a seeded sample that keeps every family; GOALKIT_FULL_CORPUS=1 runs all
cases (DEVELOPERS.md).
"""

import os
import subprocess
import sys

import pytest

from corpus_cases import generate, quick
from corpus_harness import run_case

FULL = os.environ.get("GOALKIT_FULL_CORPUS") == "1"
SEED = int(os.environ.get("GOALKIT_CORPUS_SEED", "0"))
CASES = generate(SEED) if FULL else quick(SEED)


@pytest.fixture(scope="module")
def base(tmp_path_factory):
    """Small demo logs, their layout and recipe, and a set built from them (shared, read only)."""
    from goalkit.demo import make_demo

    d = tmp_path_factory.mktemp("corpus-base")
    make_demo(d, episodes=20, seed=9)
    res = subprocess.run([sys.executable, "-m", "goalkit.cli", "build", str(d / "gantry-recipe.toml"),
                          "--out", str(d / "set.h5"), "--quiet"], capture_output=True, text=True, timeout=120)
    assert res.returncode == 0, res.stderr
    return d


@pytest.mark.parametrize("case", CASES, ids=[c.name for c in CASES])
def test_case(case, base, tmp_path):
    run_case(case, tmp_path / "case", base)


def test_the_generator_is_deterministic_and_the_sample_covers_every_command():
    assert [c.name for c in generate(0)] == [c.name for c in generate(0)]
    assert [c.name for c in quick(0)] == [c.name for c in quick(0)]
    commands = {c.args[0] for c in quick(0)}
    assert commands >= {"build", "tune", "scan", "embed", "verify", "demo"}
