"""A correct set passes the audit: across seeds, and with p-values that behave under the null."""

from __future__ import annotations

import json

import numpy as np
import pytest
from click.testing import CliRunner
from scipy.stats import binomtest

from conftest import write_recipe
from goalkit.audit import audit_set
from goalkit.cli import main
from goalkit.pipeline.build import build
from goalkit.pipeline.recipe import load_recipe

SEEDS = 20


@pytest.fixture(scope="module")
def audits(demo_logs):
    """Audit of the demo set built with 20 seeds (and split salts), both past_end rules."""
    out = []
    for seed in range(SEEDS):
        recipe = write_recipe(demo_logs, f"seed-{seed}.toml", seed=seed, salt=seed,
                              past_end="truncate" if seed % 2 else "clip")
        r = load_recipe(recipe)
        from dataclasses import replace

        r = replace(r, output=replace(r.output, path=demo_logs / f"seed-{seed}.h5"))
        build(r)
        out.append(audit_set(r.output.path))
    return out


def test_no_correct_set_fails(audits):
    failed = [(i, a.failures) for i, a in enumerate(audits) if not a.ok]
    assert failed == []
    assert all(len(a.checks) >= 20 for a in audits)


def test_p_values_are_not_too_small_under_the_null(audits):
    # the tests are exact, chi-square with >= 20 expected per bin, or conservative bounds:
    # under the null at most about 1% of p-values fall below 0.01 (scipy.stats.binomtest)
    p = np.array([c.p_value for a in audits for c in a.checks])
    k = int(np.sum(p <= 0.01))
    assert binomtest(k, len(p), 0.01, alternative="greater").pvalue > 1e-3, (k, len(p))
    # and they are not all 1 (the checks do look at the data)
    assert np.median(p) < 0.9


def test_audit_uses_the_sets_own_seed(demo_logs, tmp_path):
    recipe = write_recipe(demo_logs, "seed-override.toml", seed=0)
    out = tmp_path / "seven.h5"
    res = CliRunner().invoke(main, ["build", str(recipe), "--out", str(out), "--seed", "7", "--quiet"])
    assert res.exit_code == 0, res.output
    a = audit_set(out)
    assert a.seed == 7 and a.ok, a.failures
    b = audit_set(out, sample=2000)
    assert b.seed == 7 and b.ok and 2000 <= sum(b.rows.values()) < 2000 + 4096   # blocks of one storage chunk


def test_verify_lists_the_checks(demo_logs, tmp_path):
    recipe = write_recipe(demo_logs, "cli.toml", seed=1)
    out = tmp_path / "cli.h5"
    assert CliRunner().invoke(main, ["build", str(recipe), "--out", str(out), "--quiet"]).exit_code == 0
    res = CliRunner().invoke(main, ["verify", str(out), "--quiet", "--json"])
    assert res.exit_code == 0, res.output
    audit = json.loads(res.output)["checked"]["audit"]
    names = {c["name"] for c in audit["checks"]}
    assert {"share of future", "split fraction", "law of geometric offset", "slot pairs: same strategy"} <= names
    assert all(0.0 <= c["p_value"] <= 1.0 and c["threshold"] <= 1e-6 for c in audit["checks"])
    res = CliRunner().invoke(main, ["verify", str(out)])
    assert res.exit_code == 0 and "audit: " in res.output and "share of future: p = " in res.output
    res = CliRunner().invoke(main, ["verify", str(out), "--sample", "3000", "--json"])
    assert res.exit_code == 0, res.output
    got = json.loads(res.output)
    assert got["ok"] and got["checked"]["audit"]["sample"] == 3000
    assert 3000 <= sum(got["checked"]["audit"]["rows"].values()) < 3000 + 4096
    assert "0.0086" in CliRunner().invoke(main, ["verify", "--help"]).output


def test_sample_audit_catches_a_tampered_share(demo_logs, tmp_path):
    # a set whose strategy column was rewritten (and its manifest left alone): the audit alone
    # on a sample sees the rules broken
    import h5py

    recipe = write_recipe(demo_logs, "tamper.toml", seed=2)
    out = tmp_path / "t.h5"
    assert CliRunner().invoke(main, ["build", str(recipe), "--out", str(out), "--quiet"]).exit_code == 0
    with h5py.File(out, "r+") as f:
        s = f["train"]["strategy"][:]
        s[s == 3] = 2          # every episode goal relabelled as future
        f["train"]["strategy"][:] = s
    res = CliRunner().invoke(main, ["verify", str(out), "--sample", "4000"])
    assert res.exit_code == 1 and "audit FAILED" in res.output and "check 'share of episode'" in res.output


def test_unreadable_inputs_are_one_line_errors(demo_logs, tmp_path):
    import h5py

    recipe = write_recipe(demo_logs, "bad.toml", seed=4)
    out = tmp_path / "b.h5"
    assert CliRunner().invoke(main, ["build", str(recipe), "--out", str(out), "--quiet"]).exit_code == 0
    with h5py.File(out, "r+") as f:
        del f["validation"]["steps_to_goal"]
    res = CliRunner().invoke(main, ["verify", str(out), "--sample", "100"])
    assert res.exit_code == 1 and "column validation/steps_to_goal is missing" in res.output
    with h5py.File(out, "r+") as f:
        f.attrs["recipe"] = "[relabel.weights]\nfuturre = 1\n"
    res = CliRunner().invoke(main, ["verify", str(out), "--sample", "100"])
    assert res.exit_code == 2 and "Traceback" not in res.output and "futurre" in res.output
    plain = tmp_path / "plain.h5"
    with h5py.File(plain, "w") as f:
        f["x"] = [1, 2]
    res = CliRunner().invoke(main, ["verify", str(plain), "--sample", "100"])
    assert res.exit_code == 2 and "not a goalkit set" in res.output
