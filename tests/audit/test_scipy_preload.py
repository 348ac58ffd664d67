"""The audit's scipy: not imported with verify, loaded on a thread by the fed audit, and the
tests then give scipy's own answers."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]

SCRIPT = r"""
import sys
import goalkit.write.verify, goalkit.audit
heavy = [m for m in ("scipy.stats", "scipy.optimize", "scipy.spatial", "scipy.sparse.csgraph") if m in sys.modules]
assert heavy == [], heavy     # importing verify and the audit loads none of these
from goalkit.audit import stattests
stattests.preload_scipy()
assert stattests._preloading and stattests._preloading[0].name == "goalkit-audit-scipy"
stattests.preload_scipy()     # once only
assert len(stattests._preloading) == 1
stattests.wait_for_scipy()
assert "scipy.stats" in sys.modules and "scipy.optimize" in sys.modules
import numpy as np
from scipy.stats import binomtest, chisquare
got = stattests.binom_check("share", 412, 2000, 0.2, "rows")
assert got.p_value == binomtest(412, 2000, 0.2).pvalue, got
fine = np.arange(1000) % 7 + 30
got = stattests.uniform_chi2_check("law", fine, "PIT")
res = chisquare(fine.reshape(50, -1).sum(axis=1))
assert (got.statistic, got.p_value) == (res.statistic, res.pvalue), got
print("ok")
"""


def test_scipy_is_loaded_on_a_thread_and_the_tests_are_scipys():
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    res = subprocess.run([sys.executable, "-c", SCRIPT], cwd=ROOT, env=env, capture_output=True, text=True,
                         timeout=120)
    assert res.returncode == 0, res.stderr
    assert res.stdout.strip() == "ok"
