"""A latency distribution that knows its own spread.

Percentiles use numpy's default (linear interpolation between order
statistics). Confidence intervals of a percentile use the standard
distribution-free interval from order statistics: the number of samples
below the true q-quantile is Binomial(n, q), so [x_(l), x_(u)] with
F(l-1) <= alpha/2 and F(u-1) >= 1 - alpha/2 (F the binomial CDF) covers the
quantile with probability >= 1 - alpha, whatever the latency distribution.
No normality assumption: latency distributions are skewed and multi-modal.
"""
from __future__ import annotations

import math

import numpy as np

from speedbench.schema import LATENCY_PERCENTILES


def binomial_cdf(n: int, q: float) -> np.ndarray:
    """CDF of Binomial(n, q) at k = 0..n, computed in log space (stable for large n)."""
    k = np.arange(n + 1, dtype=np.float64)
    log_fact = np.concatenate([[0.0], np.cumsum(np.log(np.arange(1, n + 1, dtype=np.float64)))])
    log_comb = log_fact[n] - log_fact - log_fact[::-1]
    log_pmf = log_comb + k * math.log(q) + (n - k) * math.log1p(-q)
    return np.minimum(np.cumsum(np.exp(log_pmf)), 1.0)


def quantile_ci_ranks(n: int, q: float, confidence: float = 0.95) -> tuple[int, int, bool]:
    """1-based ranks (l, u) of the order statistics bounding the q-quantile.

    The third value is False when n is too small for the requested confidence
    and a bound had to be clipped to the sample minimum or maximum.
    """
    if n < 1:
        raise ValueError("need at least one sample")
    alpha = 1.0 - confidence
    cdf = binomial_cdf(n, q)
    lower = int(np.count_nonzero(cdf <= alpha / 2))       # largest l with F(l-1) <= alpha/2
    upper = int(np.argmax(cdf >= 1 - alpha / 2)) + 1      # smallest u with F(u-1) >= 1-alpha/2
    complete = lower >= 1 and upper <= n
    return max(lower, 1), min(upper, n), complete


class Measurement:
    """Every timed sample of one point (ms), with its statistics computed on demand."""

    def __init__(self, samples_ms, confidence: float = 0.95, noisy_cov: float = 0.10, rel_ci: float = 0.02):
        self.samples_ms = np.asarray(samples_ms, dtype=np.float64).ravel()
        if self.samples_ms.size == 0:
            raise ValueError("a Measurement needs at least one sample")
        if not np.all(np.isfinite(self.samples_ms)):
            raise ValueError("latency samples must be finite")
        self.confidence = confidence
        self.noisy_cov = noisy_cov
        self.rel_ci = rel_ci
        self._sorted = np.sort(self.samples_ms)

    # location and spread
    @property
    def n(self) -> int:
        return int(self.samples_ms.size)

    @property
    def min(self) -> float:
        return float(self._sorted[0])

    @property
    def mean(self) -> float:
        return float(self.samples_ms.mean())

    @property
    def std(self) -> float:
        return float(self.samples_ms.std(ddof=1)) if self.n > 1 else 0.0

    @property
    def cov(self) -> float:
        """Coefficient of variation, std / mean."""
        return self.std / self.mean if self.mean > 0 else float("nan")

    def percentile(self, p: float) -> float:
        return float(np.percentile(self.samples_ms, p))

    @property
    def median(self) -> float:
        return self.percentile(50)

    def ci(self, p: float) -> tuple[float, float]:
        """Distribution-free `confidence` interval of the p-th percentile (see module docstring)."""
        lo, hi, _ = quantile_ci_ranks(self.n, p / 100.0, self.confidence)
        return float(self._sorted[lo - 1]), float(self._sorted[hi - 1])

    def ci_complete(self, p: float) -> bool:
        """False when there are too few samples for a CI of this percentile at this confidence."""
        return quantile_ci_ranks(self.n, p / 100.0, self.confidence)[2]

    @property
    def median_rel_halfwidth(self) -> float:
        """Half-width of the median's CI relative to the median (the stopping criterion)."""
        lo, hi = self.ci(50)
        med = self.median
        return (hi - lo) / 2 / med if med > 0 else float("inf")

    @property
    def noisy(self) -> bool:
        """Too spread to rank on: CoV above noisy_cov, or the median's CI never got as tight as rel_ci."""
        return bool(self.cov > self.noisy_cov or self.median_rel_halfwidth > self.rel_ci
                    or not self.ci_complete(50))

    def summary(self) -> dict:
        out = {"n_samples": self.n, "lat_min_ms": self.min, "lat_mean_ms": self.mean,
               "lat_std_ms": self.std, "lat_cov": self.cov}
        for p in LATENCY_PERCENTILES:
            lo, hi = self.ci(p)
            out[f"lat_p{p}_ms"] = self.percentile(p)
            out[f"lat_p{p}_ci_lo_ms"] = lo
            out[f"lat_p{p}_ci_hi_ms"] = hi
        out["noisy"] = self.noisy
        return out

    def __repr__(self) -> str:
        lo, hi = self.ci(50)
        flag = ", noisy" if self.noisy else ""
        return (f"Measurement(n={self.n}, p50={self.median:.3f} ms [{lo:.3f}, {hi:.3f}], "
                f"p90={self.percentile(90):.3f} ms, p99={self.percentile(99):.3f} ms, cov={self.cov:.3f}{flag})")
