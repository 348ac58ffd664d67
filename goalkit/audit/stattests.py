"""Statistical tests of the audit and Holm's step-down control of the family error.

Every test returns a :class:`Check` with its statistic and p-value; :func:`holm` then gives
each check its threshold so that a correct set fails any of them with probability at most
``alpha`` (Holm 1979, "A simple sequentially rejective multiple test procedure").
"""

from __future__ import annotations

import importlib
import math
import sys
import threading
from dataclasses import dataclass, replace

import numpy as np

#: Fewest expected rows per bin of a chi-square test. The usual rule of thumb is 5; the
#: audit's thresholds sit far in the tail (about 1e-8), where the chi-square approximation
#: needs more, so bins are merged until each expects at least this many.
MIN_EXPECTED = 20

#: Fine histogram of PIT values; chi-square bins are merged from it (a divisor of it).
FINE_BINS = 1000
_BIN_CHOICES = (50, 40, 25, 20, 10, 8, 5, 4, 2)

#: The scipy modules the tests below use; importing them takes about half a second of CPU.
SCIPY_MODULES = ("scipy.stats", "scipy.optimize")
_preloading: list = []


def preload_scipy() -> None:
    """Import :data:`SCIPY_MODULES` on a background thread, once, if not imported yet.

    An audit fed by verify's replay calls this when the replay starts: the import then runs
    while the replay waits for its first chunk of logs, and the tests at the end find scipy
    loaded. Each test waits for this thread before it imports scipy itself (so the import is
    never run twice at once); a failed import is left for that import to raise.
    """
    if _preloading or all(name in sys.modules for name in SCIPY_MODULES):
        return
    thread = threading.Thread(target=_import_scipy, name="goalkit-audit-scipy", daemon=True)
    _preloading.append(thread)
    thread.start()


def _import_scipy() -> None:
    for name in SCIPY_MODULES:
        try:
            importlib.import_module(name)
        except Exception:   # noqa: BLE001  the test that needs it imports it again and raises
            return


def wait_for_scipy() -> None:
    """Wait for :func:`preload_scipy`'s thread, if one runs."""
    for thread in _preloading:
        thread.join()


@dataclass(frozen=True)
class Check:
    """One statistical check.

    Attributes
    ----------
    name : str
    test : str
        The test used.
    statistic : float
    p_value : float
    threshold : float
        Holm's threshold for this check (set by :func:`holm`).
    passed : bool
    detail : str
    """

    name: str
    test: str
    statistic: float
    p_value: float
    threshold: float = float("nan")
    passed: bool = True
    detail: str = ""

    def as_dict(self) -> dict:
        return {"name": self.name, "test": self.test, "statistic": float(self.statistic),
                "p_value": float(self.p_value), "threshold": float(self.threshold),
                "passed": bool(self.passed), "detail": self.detail}


def count_bound_check(name: str, observed: int, probs, counts, what: str) -> Check | None:
    """Two-sided test of a count of independent Bernoulli events with known probabilities.

    ``S`` is a sum of independent Bernoulli(p_i); ``probs`` holds the distinct p_i and
    ``counts`` how many events have each. The Chernoff bound
    ``P(S >= a) <= min over l > 0 of exp(K(l) - l a)`` (``l < 0`` for ``P(S <= a)``), with
    ``K(l) = sum_i log(1 + p_i (e^l - 1))`` the cumulant generating function of ``S``, holds
    for any such sum; twice the bound on the observed side is a valid (conservative) two-sided
    p-value however small the counts. Returns None when no event can happen and none did.
    """
    wait_for_scipy()
    from scipy.optimize import minimize_scalar

    p = np.asarray(probs, dtype=np.float64)
    n = np.asarray(counts, dtype=np.float64)
    # certain events (p = 1) always happen: test the rest against what remains of the count
    certain = float(np.sum(n[p >= 1.0]))
    keep = (p > 0.0) & (p < 1.0)
    p, n = p[keep], n[keep]
    observed = observed - certain
    if observed < 0 or observed > np.sum(n):
        return Check(name, "count vs expectation (Chernoff bound)", float(observed + certain), 0.0,
                     detail=f"{what}: {int(observed + certain)} seen, impossible under the law")
    a, mu = float(observed), float(np.sum(p * n))
    if mu <= 0:
        if a == 0:
            return None
        return Check(name, "count vs expectation (Chernoff bound)", a, 0.0, detail=f"{what}: {int(a)} seen, 0 possible")

    log_p1, log_q = np.log(p), np.log1p(-p)

    def log_bound(lam):   # K(lam) - lam a, with log(1 - p + p e^lam) computed stably
        return float(np.sum(n * np.logaddexp(log_q, log_p1 + lam))) - lam * a

    if a == mu:
        log_p = 0.0
    else:
        lo, hi = (1e-12, 60.0) if a > mu else (-60.0, -1e-12)
        res = minimize_scalar(log_bound, bounds=(lo, hi), method="bounded", options={"xatol": 1e-10})
        log_p = min(0.0, res.fun, log_bound(hi if a > mu else lo))
    pval = min(1.0, 2.0 * math.exp(log_p))
    return Check(name, "count vs expectation (Chernoff bound)", a + certain, pval,
                 detail=f"{what}: {int(a + certain)} seen, {mu + certain:.1f} expected")


def uniform_chi2_check(name: str, fine_hist: np.ndarray, what: str) -> Check | None:
    """Chi-square test that PIT values (counted in :data:`FINE_BINS` equal bins) are uniform."""
    wait_for_scipy()
    from scipy.stats import chisquare

    fine = np.asarray(fine_hist, dtype=np.int64)
    n = int(fine.sum())
    bins = next((b for b in _BIN_CHOICES if n / b >= MIN_EXPECTED), None)
    if bins is None:
        return None
    counts = fine.reshape(bins, -1).sum(axis=1)
    res = chisquare(counts)
    return Check(name, f"chi-square, {bins} equal-probability bins", float(res.statistic), float(res.pvalue),
                 detail=f"{what}: {n} rows")


def grid_chi2_check(name: str, fine_grid: np.ndarray, what: str) -> Check | None:
    """Chi-square test that PIT pairs (U_a, U_b) (counted on a 10 x 10 grid) are uniform on the square."""
    wait_for_scipy()
    from scipy.stats import chisquare

    fine = np.asarray(fine_grid, dtype=np.int64)
    n = int(fine.sum())
    for b in (10, 5, 2):
        if n / (b * b) >= MIN_EXPECTED:
            f = fine.shape[0] // b
            counts = fine.reshape(b, f, b, f).sum(axis=(1, 3)).ravel()
            res = chisquare(counts)
            return Check(name, f"chi-square, {b} x {b} grid", float(res.statistic), float(res.pvalue),
                         detail=f"{what}: {n} pairs")
    return None


def binom_check(name: str, k: int, n: int, p: float, what: str) -> Check | None:
    """Exact two-sided binomial test (``scipy.stats.binomtest``)."""
    wait_for_scipy()
    from scipy.stats import binomtest

    if n == 0:
        return None
    if p <= 0.0 or p >= 1.0:
        ok = (k == 0) if p <= 0.0 else (k == n)
        return Check(name, "exact binomial", float(k), 1.0 if ok else 0.0, detail=f"{what}: {k} of {n}, p = {p}")
    res = binomtest(int(k), int(n), float(p))
    return Check(name, "exact binomial", float(k), float(res.pvalue),
                 detail=f"{what}: {k} of {n} ({k / n:.4f}), expected {p:.4f}")


def holm(checks, alpha: float) -> list[Check]:
    """Holm's step-down procedure over ``checks``; returns them with thresholds and verdicts.

    The i-th smallest p-value (i = 0, 1, ...) is compared with ``alpha / (m - i)``; checks are
    rejected in that order until the first one that is not, and none after it. The chance
    that any check of a correct set fails is at most ``alpha`` (Holm 1979).
    """
    checks = list(checks)
    m = len(checks)
    order = sorted(range(m), key=lambda i: checks[i].p_value)
    out = list(checks)
    rejecting = True
    for rank, i in enumerate(order):
        thr = alpha / (m - rank)
        rejecting = rejecting and checks[i].p_value <= thr
        out[i] = replace(checks[i], threshold=thr, passed=not rejecting)
    return out


def share_power(n: int, share: float, alpha_test: float, power: float = 0.9) -> float:
    """Smallest upward shift of a strategy share that the exact binomial test detects.

    Computed, not approximated: the rejection region of the two-sided test at level
    ``alpha_test`` (each tail at ``alpha_test / 2``, which is conservative for
    ``scipy.stats.binomtest``) under ``Binomial(n, share)``, then the smallest shift ``d`` with
    ``P(reject | share + d) >= power``, found by bisection.

    Parameters
    ----------
    n : int
        Rows audited.
    share : float
        The strategy's share under the recipe.
    alpha_test : float
        Level of the single test (e.g. the family level divided by the number of checks).
    power : float

    Returns
    -------
    float
        The shift (a probability); ``nan`` when even a share of 1 is not detected.
    """
    wait_for_scipy()
    from scipy.stats import binom

    lo_k = binom.ppf(alpha_test / 2, n, share) - 1          # P(X <= lo_k) <= alpha/2
    hi_k = binom.isf(alpha_test / 2, n, share) + 1          # P(X >= hi_k) <= alpha/2

    def reject_prob(q):
        return binom.cdf(lo_k, n, q) + binom.sf(hi_k - 1, n, q)

    if reject_prob(1.0) < power:
        return float("nan")
    a, b = share, 1.0
    for _ in range(60):
        mid = 0.5 * (a + b)
        a, b = (mid, b) if reject_prob(mid) < power else (a, mid)
    return b - share
