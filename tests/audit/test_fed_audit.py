"""verify feeds the audit the rows and episodes it read: the audit's report is the standalone one.

The audit run inside ``verify`` (goalkit.audit.AuditFeed: rows chunk by chunk, train and
validation interleaved) must give exactly what ``audit_set`` gives reading the set and the logs
itself (splits one after the other): the same rows, failures, statistics and p-values. The laws
behind the p-values are checked against scipy in test_laws.py and test_false_alarms.py; here the
two ways of running the same checks are compared with each other, on a correct set and on a set
with rows broken in both splits.
"""

from __future__ import annotations

import shutil
from dataclasses import replace

import h5py
import numpy as np
import pytest

import goalkit.write.verify as verify_module
from conftest import write_recipe
from goalkit.audit import audit_set
from goalkit.pipeline.build import build
from goalkit.pipeline.recipe import load_recipe
from goalkit.write.verify import verify_set


@pytest.fixture(scope="module")
def built(demo_logs):
    recipe = load_recipe(write_recipe(demo_logs, "fed.toml", seed=5, salt=2))
    recipe = replace(recipe, output=replace(recipe.output, path=demo_logs / "fed.h5"))
    build(recipe)
    return recipe.output.path


@pytest.mark.parametrize("chunk", [None, 300])
def test_fed_audit_equals_the_standalone_audit(built, monkeypatch, chunk):
    if chunk is not None:   # many small chunks: train and validation rows fed interleaved
        monkeypatch.setattr(verify_module, "chunk_transitions", lambda plan: chunk)
    report = verify_set(built)
    alone = audit_set(built).as_dict()
    assert report.ok, report.failures
    assert report.checked["audit"] == alone
    assert sum(alone["rows"].values()) > 0 and len(alone["checks"]) >= 20


def test_fed_audit_reports_broken_rows_as_the_standalone_audit(built, tmp_path, monkeypatch):
    broken = tmp_path / "broken.h5"
    shutil.copyfile(built, broken)
    with h5py.File(broken, "r+") as f:
        for split in ("validation", "train"):   # the same slip in both splits: the first is train's
            steps = f[split]["steps_to_goal"][:]
            rows = np.flatnonzero(steps > 0)[5:9]
            steps[rows] += 1
            f[split]["steps_to_goal"][:] = steps
    monkeypatch.setattr(verify_module, "chunk_transitions", lambda plan: 300)
    report = verify_set(broken)
    alone = audit_set(broken)
    assert not alone.ok
    assert report.checked["audit"] == alone.as_dict()
    audit_lines = [m for m in report.failures if m.startswith("audit: ")]
    assert audit_lines == [f"audit: {m}" for m in alone.failures][:len(audit_lines)]
    assert any("steps" in m and " train row " in m for m in alone.failures), alone.failures
