"""Latency intervals that include process-to-process variation.

A point measured in R independent worker processes (invocations) has two levels of
variation: run to run within a process, and process to process (where the OS put the
threads, which mode ORT's spinning workers fell into, memory layout). An interval from
one process only sees the first. Here each percentile's point estimate and interval come
from a hierarchical (two-level) bootstrap: resample invocations with replacement, then
the samples within each chosen invocation with replacement, and take the percentile of
what was drawn (Kalibera & Jones, "Rigorous Benchmarking in Reasonable Time", ISMM 2013,
section on multi-level resampling; the repeated process invocations follow Georges,
Buytaert & Eeckhout, "Statistically Rigorous Java Performance Evaluation", OOPSLA 2007).

The statistic is a percentile of the equal-weight mixture of the invocations (each
invocation weighs the same whatever its sample count): samples carry weight 1/n_i and
the weighted percentile uses the midpoint plotting positions (Hazen). With few
invocations the plain percentile interval of a bootstrap is too narrow (it estimates the
spread of R values with divisor R and with normal tails), so the interval is Hesterberg's
"expanded percentile interval" (T. Hesterberg, "What Teachers Should Know About the
Bootstrap", The American Statistician 69(4), 2015; formula from memory): the bootstrap
distribution's alpha'/2 and 1 - alpha'/2 quantiles with
alpha'/2 = Phi(-sqrt(R/(R-1)) t_{alpha/2, R-1}), R being the number of top-level units
(invocations), joined with the t interval on the bootstrap standard error (see _interval).
Resampling the runs within each drawn invocation as well counts the within-process
share of the spread a second time (Davison & Hinkley, "Bootstrap Methods and their
Application", 1997, section 3.8), so the interval errs on the wide side when runs
within a process vary more than processes do.
"""
from __future__ import annotations

import math
from statistics import NormalDist

import numpy as np

from speedbench.measure.stats import Measurement

N_BOOT = 4000
_CHUNK_ELEMS = 2_000_000   # bound the memory of one resampling block


def t_two_sided(t: float, df: int) -> float:
    """P(|T| < t) for Student's t with integer df >= 1: the finite series of Abramowitz & Stegun,
    Handbook of Mathematical Functions, 26.7.3 (df odd) and 26.7.4 (df even), theta = atan(t / sqrt(df))."""
    theta = math.atan(abs(t) / math.sqrt(df))
    c2 = math.cos(theta) ** 2
    if df % 2:
        term, total = math.cos(theta), 0.0
        for k in range(1, (df - 1) // 2 + 1):      # cos + 2/3 cos^3 + 2.4/(3.5) cos^5 + ... up to cos^(df-2)
            total += term
            term *= c2 * (2 * k) / (2 * k + 1)
        return (2 / math.pi) * (theta + math.sin(theta) * total) if df > 1 else 2 * theta / math.pi
    term, total = 1.0, 0.0
    for k in range(1, df // 2 + 1):               # 1 + 1/2 cos^2 + 1.3/(2.4) cos^4 + ... up to cos^(df-2)
        total += term
        term *= c2 * (2 * k - 1) / (2 * k)
    return math.sin(theta) * total


def t_quantile(p: float, df: int) -> float:
    """Quantile of Student's t with integer df >= 1 (bisection on t_two_sided; exact to ~1e-10)."""
    if not 0 < p < 1 or df < 1:
        raise ValueError("need 0 < p < 1 and df >= 1")
    if p == 0.5:
        return 0.0
    target = abs(2 * p - 1)
    lo, hi = 0.0, 1.0
    while t_two_sided(hi, df) < target:
        hi *= 2
    for _ in range(200):
        mid = (lo + hi) / 2
        if t_two_sided(mid, df) < target:
            lo = mid
        else:
            hi = mid
        if hi - lo <= 1e-12 * hi:
            break
    return math.copysign((lo + hi) / 2, p - 0.5)


def expanded_alpha(confidence: float, units: int, df: int | None = None) -> float:
    """Tail probability (each side) of Hesterberg's expanded percentile interval for `units` top-level units.

    df: degrees of freedom of the t quantile, units - 1 by default. For a ratio of two
    independent estimates (analyse.regression) we pass the pooled two-sample df, R1 + R2 - 2,
    and the smaller R as units: our adaptation of the one-sample expansion, checked by the
    A/A and coverage tests rather than taken from the paper.
    """
    alpha = 1.0 - confidence
    if units < 2:
        return alpha / 2
    t = t_quantile(1 - alpha / 2, df or units - 1)
    return NormalDist().cdf(-math.sqrt(units / (units - 1)) * t)


def weighted_percentiles(values: np.ndarray, weights: np.ndarray, qs) -> np.ndarray:
    """Percentiles (qs in 0..100) of each row of `values` under `weights` (same shape, >= 0).

    Midpoint plotting positions: a sorted value with weight w_k sits at (S_k - w_k / 2) / S,
    S_k the cumulative weight; between positions the percentile is interpolated linearly,
    outside them it is the first / last value of positive weight. Zero-weight entries are
    ignored. Returns shape (rows, len(qs)).
    """
    values = np.atleast_2d(np.asarray(values, dtype=float))
    weights = np.atleast_2d(np.asarray(weights, dtype=float))
    values = np.where(weights > 0, values, np.inf)        # ignored entries sort last
    order = np.argsort(values, axis=1, kind="stable")
    v = np.take_along_axis(values, order, axis=1)
    w = np.take_along_axis(weights, order, axis=1)
    cum = np.cumsum(w, axis=1)
    total = cum[:, -1:]
    pos = (cum - w / 2) / total
    real = (w > 0).sum(axis=1)                            # entries with weight, sorted first
    rows = np.arange(len(v))
    out = np.empty((len(v), len(qs)))
    for k, q in enumerate(qs):
        q = q / 100.0
        j = (pos <= q).sum(axis=1) - 1                    # last position at or below q
        j_lo = np.clip(j, 0, real - 1)
        j_hi = np.clip(j + 1, 0, real - 1)
        p_lo, p_hi = pos[rows, j_lo], pos[rows, j_hi]
        x_lo, x_hi = v[rows, j_lo], v[rows, j_hi]
        with np.errstate(invalid="ignore", divide="ignore"):
            frac = np.where(p_hi > p_lo, (q - p_lo) / (p_hi - p_lo), 0.0)
        frac = np.where(j < 0, 0.0, np.clip(frac, 0.0, 1.0))
        out[:, k] = x_lo + frac * (x_hi - x_lo)
    return out


def mixture_percentiles(groups, qs) -> np.ndarray:
    """Percentiles of the equal-weight mixture of the groups (the point estimate)."""
    vals = np.concatenate([np.asarray(g, dtype=float) for g in groups])
    w = np.concatenate([np.full(len(g), 1.0 / len(g)) for g in groups])
    return weighted_percentiles(vals[None, :], w[None, :], qs)[0]


def _draws(groups, n_boot: int, rng):
    """The two-level resampling itself, in blocks: yields (start, count, values, used, n_c).

    Each replicate draws R invocations with replacement (R = number of groups), then for
    each drawn invocation as many samples as it has, with replacement, from its own samples.
    values: (count, R, m) drawn samples (m the largest group, padded); used: which are real;
    n_c: (count, R) sample count of each drawn invocation.
    """
    groups = [np.asarray(g, dtype=float) for g in groups]
    r = len(groups)
    sizes = np.array([len(g) for g in groups])
    m = int(sizes.max())
    padded = np.zeros((r, m))
    for i, g in enumerate(groups):
        padded[i, :len(g)] = g
    step = max(1, _CHUNK_ELEMS // (r * m))
    for s in range(0, n_boot, step):
        k = min(step, n_boot - s)
        chosen = rng.integers(0, r, size=(k, r))                       # level 1: invocations
        n_c = sizes[chosen]                                            # (k, r)
        u = rng.random((k, r, m))
        idx = np.minimum((u * n_c[..., None]).astype(np.int64), n_c[..., None] - 1)  # level 2
        vals = padded[chosen[..., None], idx]                          # (k, r, m)
        used = np.arange(m)[None, None, :] < n_c[..., None]
        yield s, k, chosen, vals, used, n_c


def bootstrap_distribution(groups, qs, n_boot: int = N_BOOT, rng=None) -> np.ndarray:
    """Two-level bootstrap replicates of the mixture percentiles: shape (n_boot, len(qs))."""
    rng = rng if rng is not None else np.random.default_rng(0)
    r, m = len(groups), max(len(g) for g in groups)
    out = np.empty((n_boot, len(qs)))
    for s, k, _, vals, used, n_c in _draws(groups, n_boot, rng):
        w = np.where(used, 1.0 / n_c[..., None], 0.0)
        out[s:s + k] = weighted_percentiles(vals.reshape(k, r * m), w.reshape(k, r * m), qs)
    return out


def hierarchical_rate_ci(groups, rates, confidence: float = 0.95, n_boot: int = N_BOOT, rng=None) -> tuple:
    """(estimate, ci_lo, ci_hi) of a throughput measured once per invocation (frames/s).

    The estimate is the mean of the invocations' rates. The same two-level resampling as the
    percentiles: level 1 draws invocations; level 2 draws the requests of each drawn invocation
    and rescales its rate by Little's law at a fixed number in flight (a closed loop keeps K
    requests in flight): X* = X mean(W) / mean(W*), W the request latencies.
    """
    rng = rng if rng is not None else np.random.default_rng(0)
    rates = np.asarray(rates, dtype=float)
    means = np.array([np.mean(g) for g in groups], dtype=float)
    boot = np.empty((n_boot, 1))
    for s, k, chosen, vals, used, n_c in _draws(groups, n_boot, rng):
        drawn_mean = np.where(used, vals, 0.0).sum(axis=2) / n_c      # (k, r)
        boot[s:s + k, 0] = (rates[chosen] * means[chosen] / drawn_mean).mean(axis=1)
    est = np.array([rates.mean()])
    lo, hi = _interval(est, boot, confidence, len(groups), max(len(groups) - 1, 1))
    return float(est[0]), float(lo[0]), float(hi[0])


def hierarchical_ci(groups, qs=(50, 90, 99), confidence: float = 0.95, n_boot: int = N_BOOT,
                    rng=None) -> dict:
    """{q: (estimate, ci_lo, ci_hi)} from the hierarchical bootstrap (module docstring)."""
    est = mixture_percentiles(groups, qs)
    boot = bootstrap_distribution(groups, qs, n_boot, rng)
    lo, hi = _interval(est, boot, confidence, len(groups), len(groups) - 1)
    return {q: (float(est[k]), float(lo[k]), float(hi[k])) for k, q in enumerate(qs)}


def _interval(est, boot, confidence: float, units: int, df: int):
    """Expanded percentile interval, widened where needed to the t interval on the bootstrap SE.

    A percentile interval never reaches beyond the most extreme invocation, so with R
    invocations it misses the true value at least 2 x 0.5^R of the time (6 % at R = 5)
    however it is expanded. The union with est +- t_{df} sqrt(R/(R-1)) SE* (SE* the bootstrap
    standard error, the same small-sample correction) removes that limit; the percentile
    side keeps the interval's asymmetry for skewed latencies. The t part is taken on the log
    scale (est x exp(+-t SE* of log)): latency is a positive, ratio-scale quantity, and on a
    noisy host an additive t interval reached below zero (a p50 "CI -12.9 to 70.2 ms" in a
    demo run at load 6); for small spreads the two agree.
    """
    est = np.asarray(est, dtype=float)
    tail = expanded_alpha(confidence, units, df)
    lo = np.quantile(boot, tail, axis=0)
    hi = np.quantile(boot, 1 - tail, axis=0)
    if units >= 2:
        factor = t_quantile(0.5 + confidence / 2, df) * math.sqrt(units / (units - 1))
        positive = np.all(boot > 0, axis=0) & (est > 0)
        with np.errstate(divide="ignore", invalid="ignore"):
            log_half = factor * np.log(np.where(boot > 0, boot, 1.0)).std(axis=0, ddof=1)
            half = factor * boot.std(axis=0, ddof=1)
            t_lo = np.where(positive, est * np.exp(-log_half), est - half)
            t_hi = np.where(positive, est * np.exp(log_half), est + half)
        lo, hi = np.minimum(lo, t_lo), np.maximum(hi, t_hi)
    return np.minimum(lo, est), np.maximum(hi, est)


def spread(groups, confidence: float = 0.95) -> dict:
    """Between-invocation spread of the medians against the within-invocation uncertainty.

    between_cov: CoV of the invocation medians. between_dominates: the between-invocation
    variance component of the median exceeds the within-invocation one. As in the
    variance-components reasoning of Kalibera & Jones (ISMM 2013), the spread of the
    invocation medians S2^2 contains the within part W (each median's own sampling
    variance, here from its order-statistic CI: half-width / z) plus the between part
    T = S2^2 - W; "dominates" means T > W. When it does, more invocations with fewer
    runs each buy more precision than longer invocations.
    """
    medians = np.array([np.median(g) for g in groups], dtype=float)
    if len(groups) < 2:
        return {"between_cov": math.nan, "between_dominates": False}
    s2 = float(np.var(medians, ddof=1))
    z = NormalDist().inv_cdf(0.5 + confidence / 2)
    within = []
    for g in groups:
        m = Measurement(g, confidence=confidence)
        lo, hi = m.ci(50)
        within.append(((hi - lo) / 2 / z) ** 2)
    w = float(np.mean(within))
    mean = float(medians.mean())
    return {"between_cov": float(np.std(medians, ddof=1) / mean) if mean > 0 else math.nan,
            "between_dominates": bool(s2 - w > w)}


# What a row says its latency interval covers (column ci_scope).
ONE_PROCESS = "one process: the interval covers run-to-run variation within one worker only, not a rerun"
HIERARCHICAL = "{r} processes: hierarchical bootstrap over invocations and their runs"


class Replicated(Measurement):
    """Every timed sample of one point over R invocations, each tagged with its invocation index.

    Location and spread (min, mean, std, CoV) are over all samples; percentiles and their
    intervals come from the hierarchical bootstrap when R >= 2, from the order-statistic
    interval of the single process when R = 1 (and the row says so in ci_scope).
    """

    def __init__(self, samples_ms, invocation, confidence: float = 0.95, noisy_cov: float = 0.10,
                 rel_ci: float = 0.02, n_boot: int = N_BOOT, seed: int = 0):
        super().__init__(samples_ms, confidence=confidence, noisy_cov=noisy_cov, rel_ci=rel_ci)
        self.invocation = np.asarray(invocation, dtype=np.int64).ravel()
        if self.invocation.shape != self.samples_ms.shape:
            raise ValueError("one invocation index per sample")
        self.n_boot, self.seed = n_boot, seed
        self._summary = None

    @property
    def groups(self) -> list[np.ndarray]:
        return [self.samples_ms[self.invocation == k] for k in np.unique(self.invocation)]

    @property
    def invocations(self) -> int:
        return int(np.unique(self.invocation).size)

    def _hier(self) -> dict:
        if self._summary is None:
            self._summary = hierarchical_ci(self.groups, (50, 90, 99), self.confidence, self.n_boot,
                                            np.random.default_rng(self.seed))
        return self._summary

    def percentile(self, p: float) -> float:
        if self.invocations < 2:
            return super().percentile(p)
        if p in (50, 90, 99):
            return self._hier()[p][0]
        return float(mixture_percentiles(self.groups, (p,))[0])

    def ci(self, p: float) -> tuple[float, float]:
        if self.invocations < 2:
            return super().ci(p)
        if p in (50, 90, 99):
            return self._hier()[p][1:]
        got = hierarchical_ci(self.groups, (p,), self.confidence, self.n_boot, np.random.default_rng(self.seed))
        return got[p][1:]

    def ci_complete(self, p: float) -> bool:
        return super().ci_complete(p) if self.invocations < 2 else True

    @property
    def noisy(self) -> bool:
        if self.invocations < 2:
            return super().noisy
        return bool(self.cov > self.noisy_cov or spread(self.groups, self.confidence)["between_cov"] > self.noisy_cov)

    def summary(self) -> dict:
        out = super().summary()
        out.update(spread(self.groups, self.confidence))
        out["invocations"] = self.invocations
        out["ci_scope"] = ONE_PROCESS if self.invocations < 2 else HIERARCHICAL.format(r=self.invocations)
        return out
