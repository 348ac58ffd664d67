"""Fixtures of the audit tests: small demo logs and a recipe that uses most strategies."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import pytest

from goalkit.demo import make_demo

PACKAGE = Path(__file__).resolve().parents[2] / "goalkit"

RECIPE = """version = 1
seed = {seed}

[logs]
path = "gantry-logs.h5"
layout = "gantry-layout.toml"

[goal]
fields = ["head", "trays"]
dtype = "float32"

[relabel]
goals_per_transition = 4          # k = 4 goals per transition, as HER's best "future" setting (Andrychowicz et al. 2017, section 4.5; from memory)
gamma = 0.8
past_end = "{past_end}"
[relabel.weights]
original = 1
final = 1
future = 2
episode = 1
geometric = 1
other_episode = 1

[reward]
distance = "euclidean"
threshold = {threshold}
form = "{form}"
end_on_reach = {end_on_reach}

[split]
validation = 0.2
salt = {salt}

[output]
path = "set.h5"
compression = "none"
chunk_rows = 4096
"""


def write_recipe(folder: Path, name: str = "recipe.toml", *, seed: int = 3, threshold: float = 0.04,
                 form: str = "sparse-negative", end_on_reach: str = "true", past_end: str = "clip",
                 salt: int = 0) -> Path:
    """Write a recipe for the demo logs in ``folder``; returns its path."""
    path = folder / name
    path.write_text(RECIPE.format(seed=seed, threshold=threshold, form=form, end_on_reach=end_on_reach, salt=salt,
                                  past_end=past_end), encoding="utf-8")
    return path


def copy_package(target: Path) -> Path:
    """Copy the goalkit package tree to ``target/goalkit``; returns ``target`` (for PYTHONPATH)."""
    shutil.copytree(PACKAGE, target / "goalkit", ignore=shutil.ignore_patterns("__pycache__"))
    return target


def run_goalkit(package_root: Path, cwd: Path, *args) -> subprocess.CompletedProcess:
    """Run the goalkit CLI from the package copy at ``package_root`` (cwd outside the repository)."""
    env = dict(os.environ, PYTHONPATH=str(package_root))
    code = "import goalkit, sys; assert goalkit.__file__.startswith(sys.argv.pop(1)), goalkit.__file__; " \
           "from goalkit.cli import main; main()"
    return subprocess.run([sys.executable, "-c", code, str(package_root), *map(str, args)], cwd=cwd, env=env,
                          capture_output=True, text=True, timeout=300)


@pytest.fixture(scope="session")
def demo_logs(tmp_path_factory) -> Path:
    """60 demo episodes (about 2,600 transitions), shared by the audit tests."""
    d = tmp_path_factory.mktemp("audit-demo")
    make_demo(d, episodes=60, seed=11)
    return d


def selected_params(request, name: str) -> list:
    """The values of parameter ``name`` of the tests of ``request``'s module this session will run."""
    return [item.callspec.params[name] for item in request.session.items
            if getattr(item, "module", None) is request.module and hasattr(item, "callspec")
            and name in item.callspec.params]


def build_and_verify_mutants(jobs: dict, root: Path, workers: int = 2) -> dict:
    """Build and verify every mutant of ``jobs`` from its own mutated package copy, ``workers`` at a time.

    ``jobs`` maps a mutant's name to (changes, recipe): ``changes`` a list of (file under
    goalkit/, text, replacement). Each mutant's text must occur exactly once. Returns name ->
    dict(package, out, build, verify, error): ``build`` and ``verify`` the finished processes
    (``verify`` None when the build failed), ``error`` a message when a change could not be
    planted. The processes are independent (own package copy, own folder), so running two at
    a time on two cores gives the same outcomes as one after the other, in about half the time.
    """
    def one(i, name, changes, recipe):
        folder = root / f"mutant-{i}"
        folder.mkdir()
        package = copy_package(folder / "pkg")
        result = {"package": package, "out": folder / "mutant.h5", "build": None, "verify": None, "error": None}
        for rel, old, new in changes:
            target = package / "goalkit" / rel
            text = target.read_text(encoding="utf-8")
            if text.count(old) != 1:
                result["error"] = f"the mutated text must occur exactly once in {rel}; found {text.count(old)}"
                return result
            target.write_text(text.replace(old, new), encoding="utf-8")
        result["build"] = run_goalkit(package, folder, "build", recipe, "--out", result["out"], "--quiet")
        if result["build"].returncode == 0:
            result["verify"] = run_goalkit(package, folder, "verify", result["out"])
        return result

    with ThreadPoolExecutor(max_workers=workers) as pool:
        futures = {name: pool.submit(one, i, name, *job) for i, (name, job) in enumerate(jobs.items())}
        return {name: fut.result() for name, fut in futures.items()}
