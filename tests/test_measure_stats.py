"""Latency statistics: percentiles, the order-statistic CI of a percentile, stopping rules.

References: numpy.percentile (default linear method) for percentiles; scipy.stats.binom
for the binomial CDF behind the distribution-free quantile interval; the textbook
worked example for n = 20 (the 95 % CI of the median is [x_(6), x_(15)], coverage
1 - 2 P(B <= 5) = 0.9586 for B ~ Binomial(20, 1/2) - quoted from memory, checked below
by the binomial sum itself).
"""
import numpy as np
import pytest

from speedbench.measure import Measurement, Policy
from speedbench.measure.stats import binomial_cdf, quantile_ci_ranks
from speedbench.measure.timing import timed_runs, warm_up


def test_percentiles_match_numpy():
    rng = np.random.default_rng(1)
    for n in (1, 2, 7, 100, 1001):
        x = rng.lognormal(2.0, 0.5, n)
        m = Measurement(x)
        for p in (50, 90, 99):
            assert m.percentile(p) == pytest.approx(np.percentile(x, p), rel=1e-12)
        assert m.min == x.min() and m.mean == pytest.approx(x.mean())
        if n > 1:
            assert m.std == pytest.approx(np.std(x, ddof=1))
            assert m.cov == pytest.approx(np.std(x, ddof=1) / x.mean())


def test_binomial_cdf_matches_scipy():
    stats = pytest.importorskip("scipy.stats")   # scipy is a reference here, not a dependency
    for n, q in ((20, 0.5), (137, 0.9), (2000, 0.99)):
        k = np.arange(n + 1)
        assert np.allclose(binomial_cdf(n, q), stats.binom.cdf(k, n, q), atol=1e-10)


def test_median_ci_textbook_n20():
    lo, hi, complete = quantile_ci_ranks(20, 0.5, 0.95)
    assert (lo, hi, complete) == (6, 15, True)
    cdf = binomial_cdf(20, 0.5)
    assert cdf[14] - cdf[5] == pytest.approx(0.9586, abs=1e-4)
    x = np.arange(1.0, 21.0)             # order statistics are the values themselves
    assert Measurement(x).ci(50) == (6.0, 15.0)


def test_ci_ranks_definition_against_scipy():
    stats = pytest.importorskip("scipy.stats")
    for n in (10, 31, 200, 1500):
        for q in (0.5, 0.9, 0.99):
            lo, hi, complete = quantile_ci_ranks(n, q, 0.95)
            if complete:
                # coverage P(lo <= B <= hi - 1) >= 95 %, and lo/hi are the tightest such ranks
                cover = stats.binom.cdf(hi - 1, n, q) - stats.binom.cdf(lo - 1, n, q)
                assert cover >= 0.95 - 1e-12
                assert stats.binom.cdf(lo, n, q) > 0.025 and stats.binom.cdf(hi - 2, n, q) < 0.975


def test_ci_narrows_as_n_grows():
    rng = np.random.default_rng(2)
    widths = []
    for n in (30, 300, 3000):
        m = Measurement(rng.gamma(4.0, 2.0, n))
        lo, hi = m.ci(50)
        assert lo <= m.median <= hi
        widths.append(hi - lo)
    assert widths[0] > widths[1] > widths[2]


def test_ci_coverage_on_known_distribution():
    # Exponential(1): the true median is ln 2 and the true p90 is ln 10.
    rng = np.random.default_rng(3)
    trials = 600
    hits50 = hits90 = 0
    for _ in range(trials):
        m = Measurement(rng.exponential(1.0, 60))
        lo, hi = m.ci(50)
        hits50 += lo <= np.log(2) <= hi
        lo, hi = m.ci(90)
        hits90 += lo <= np.log(10) <= hi
    # the interval is conservative (>= 95 %); allow sampling error of 600 trials (~3 sd = 2.7 %)
    assert hits50 / trials >= 0.92 and hits90 / trials >= 0.92


def test_too_few_samples_for_p99_is_flagged_incomplete():
    m = Measurement(np.linspace(1, 2, 50))
    assert not m.ci_complete(99)
    assert m.ci(99)[1] == 2.0            # clipped to the sample maximum
    assert m.ci_complete(50)


def test_noisy_flag():
    rng = np.random.default_rng(4)
    steady = Measurement(rng.normal(10.0, 0.05, 500))
    assert not steady.noisy
    spread = Measurement(np.concatenate([rng.normal(10.0, 0.05, 400), rng.normal(20.0, 0.05, 100)]))
    assert spread.noisy and spread.cov > 0.1


def test_bad_samples_rejected():
    with pytest.raises(ValueError):
        Measurement([])
    with pytest.raises(ValueError):
        Measurement([1.0, float("nan")])


def test_summary_and_repr_fields():
    m = Measurement(np.arange(1.0, 101.0))
    s = m.summary()
    for key in ("n_samples", "lat_min_ms", "lat_mean_ms", "lat_std_ms", "lat_cov", "lat_p50_ms",
                "lat_p90_ci_lo_ms", "lat_p99_ci_hi_ms", "noisy"):
        assert key in s
    assert s["lat_p50_ci_lo_ms"] <= s["lat_p50_ms"] <= s["lat_p50_ci_hi_ms"]
    assert "p50=50.500 ms" in repr(m)


class Fake:
    """A callable whose latency is scripted exactly, through a fake clock (no real timing)."""

    def __init__(self, times_ms):
        self.times = list(times_ms)
        self.calls = 0
        self.now = 0

    def clock(self):
        return self.now

    def __call__(self, x):
        self.now += int(self.times[min(self.calls, len(self.times) - 1)] * 1e6)
        self.calls += 1


def test_warm_up_runs_until_settled():
    run = Fake([20, 12, 8, 5, 3, 2] + [1] * 100)
    policy = Policy(warmup_min=3, warmup_max=40, warmup_window=3, settle_tol=0.05)
    out = warm_up(run, [None], policy, clock=run.clock)
    # after run n the median of runs n-2..n is compared with that of runs n-5..n-3:
    # n=9: med(1,1,1)=1 vs med(5,3,2)=3; n=10: 1 vs med(3,2,1)=2; n=11: 1 vs med(2,1,1)=1 -> settled
    assert out == {"runs": 11, "settled": True, "samples_ms": [20, 12, 8, 5, 3, 2] + [1] * 5}


def test_warm_up_stops_at_max():
    run = Fake([1, 4] * 50)              # the window median alternates: never settles
    out = warm_up(run, [None], Policy(warmup_min=2, warmup_max=7, warmup_window=1, settle_tol=0.01),
                  clock=run.clock)
    assert out["runs"] == 7 and not out["settled"]


def test_timed_runs_stop_rules_and_keep_every_sample():
    run = Fake([1.0, 1.01] * 500)
    m, how = timed_runs(run, [None, None], Policy(min_reps=10, max_reps=500, rel_ci=0.02), clock=run.clock)
    assert how["stop"] == "ci_reached" and m.n == run.calls == 10
    assert how["per_image_p50_ms"] == [1.0, 1.01]
    run = Fake(list(np.linspace(1, 2, 1000)))          # drifting: the CI never gets tight
    m, how = timed_runs(run, [None], Policy(min_reps=5, max_reps=25, rel_ci=1e-6), clock=run.clock)
    assert how["stop"] == "max_reps" and m.n == 25 and m.samples_ms.tolist() == pytest.approx(run.times[:25])
    run = Fake([20.0] * 100)
    m, how = timed_runs(run, [None], Policy(min_reps=3, max_reps=100, rel_ci=1e-9, max_seconds=0.1),
                        clock=run.clock)
    assert how["stop"] == "max_seconds" and m.n == 5      # 5 x 20 ms reaches 0.1 s
