"""The user's callables: only the named module is imported; its errors are reported as theirs,
one line naming the entry point and what was expected, exit 2."""

import json
import subprocess
import sys

import pytest

GOALKIT = [sys.executable, "-m", "goalkit.cli"]

BAD = '''
import numpy as np

def wrong_shape(batch):
    return np.zeros(len(batch["goal"]))

def wrong_dtype(batch):
    return np.array(["a"] * len(batch["goal"]))

def with_nan(batch):
    out = np.zeros((len(batch["goal"]), 2))
    out[1, 0] = np.nan
    return out

def raises(batch):
    return _inner(batch)

def _inner(batch):
    raise RuntimeError("weights missing")

def exits(batch):
    raise SystemExit(0)

def writes_inputs(batch):
    batch["goal"][:] = 0
    batch["observation"][:] = 0
    return np.zeros((len(batch["goal"]), 2))

value_2d = lambda batch: np.zeros((len(batch["goal"]), 1))
not_callable = 3
'''


@pytest.fixture(scope="module")
def bad(grid, tmp_path_factory):
    folder = tmp_path_factory.mktemp("badck")
    (folder / "badck.py").write_text(BAD)
    (folder / "sibling_never_imported.py").write_text("raise SystemExit('imported!')\n")
    (folder / "broken_import.py").write_text("import numpy\n\n\nx = 1 / 0\n")
    return folder


def _run(grid, bad, *args):
    return subprocess.run([*GOALKIT, "assess", str(grid["set"]), str(grid["suite"]), "--import-path", str(bad),
                           "--resamples", "50", *args], capture_output=True, text=True)


@pytest.mark.parametrize("entry, expected", [
    ("badck:wrong_shape", "policy badck:wrong_shape returned shape ("),
    ("badck:wrong_dtype", "policy badck:wrong_dtype returned dtype <U1"),
    ("badck:with_nan", "policy badck:with_nan returned a non-finite number (nan) for suite row 1"),
    ("badck:raises", "policy badck:raises raised RuntimeError: weights missing on suite rows 0.."),
    ("badck:not_callable", "badck:not_callable: not_callable is a int, not callable"),
    ("badck:missing", "module badck has no attribute missing"),
    ("nosuchpkg.mod:f", "cannot import module nosuchpkg.mod (no module named nosuchpkg)"),
    ("broken_import:f", "policy broken_import:f raised ZeroDivisionError: division by zero while importing"),
    ("not an entry", "expected an entry point package.module:callable"),
    ("badck:exits", "policy badck:exits raised SystemExit: 0 on suite rows 0.."),
])
def test_bad_callables_give_one_line_and_exit_2(grid, bad, entry, expected):
    out = _run(grid, bad, "--policy", entry)
    assert out.returncode == 2, out.stderr
    lines = out.stderr.strip().splitlines()
    assert len(lines) == 1 and expected in lines[0], out.stderr
    assert "Traceback" not in out.stderr


def test_user_error_names_the_users_file_and_line(grid, bad):
    out = _run(grid, bad, "--policy", "badck:raises")
    assert f"at {bad / 'badck.py'}:19;" in out.stderr  # the raise inside _inner, the last user frame
    out = _run(grid, bad, "--policy", "broken_import:f")
    assert f"at {bad / 'broken_import.py'}:4;" in out.stderr


def test_only_the_named_module_is_imported_and_value_column_vectors_are_accepted(grid, bad):
    out = _run(grid, bad, "--value", "badck:value_2d", "--json")
    assert out.returncode == 0, out.stderr
    doc = json.loads(out.stdout)
    assert doc["value"]["checkpoints"] == ["badck:value_2d"] and "imported!" not in out.stderr
    code = ("import sys, goalkit; from goalkit.scoring.entry import load_entry; "
            f"load_entry('badck:raises', 'policy', path={str(bad)!r}); "
            "print(sorted(m for m in sys.modules if m in ('badck', 'sibling_never_imported', 'broken_import')))")
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert res.stdout.strip() == "['badck']"


def test_no_checkpoint_or_three_are_refused(grid, bad):
    out = _run(grid, bad)
    assert out.returncode == 2 and "expected at least one checkpoint" in out.stderr
    out = _run(grid, bad, "--value", "badck:value_2d", "--value", "badck:value_2d", "--value", "badck:value_2d")
    assert out.returncode == 2 and "at most two checkpoints" in out.stderr


def test_assess_writes_plots_and_refuses_existing_ones(grid, tmp_path):
    args = [*GOALKIT, "assess", str(grid["set"]), str(grid["suite"]), "--import-path", str(grid["ck"]),
            "--policy", "gridck:bfs_policy", "--value", "gridck:bfs_value", "--resamples", "50",
            "--plots", str(tmp_path / "plots"), "--quiet"]
    out = subprocess.run(args, capture_output=True, text=True)
    assert out.returncode == 0 and out.stdout == "", out.stderr
    pngs = sorted(p.name for p in (tmp_path / "plots").iterdir())
    assert pngs == ["assess-action-error.png", "assess-value.png"]
    assert all((tmp_path / "plots" / n).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" for n in pngs)
    again = subprocess.run(args, capture_output=True, text=True)
    assert again.returncode == 2 and "already exists; give --replace" in again.stderr
    assert subprocess.run(args + ["--replace"], capture_output=True, text=True).returncode == 0


def test_a_callable_that_writes_into_its_inputs_does_not_change_the_scores(grid, bad):
    from goalkit.scoring.run import assess_suite

    a = assess_suite(grid["set"], grid["suite"], import_path=bad, policies=["badck:writes_inputs"],
                     values=["badck:value_2d"], resamples=20)
    from goalkit.suites.fileformat import read_suite

    cols = read_suite(grid["suite"]).columns
    assert (a.suite_columns["goal"] == cols["goal"]).all() and (a.suite_columns["state"] == cols["state"]).all()
