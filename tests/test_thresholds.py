"""Threshold policies against outside references: pandas rolling median, scipy MAD and
genpareto, the SPOT paper's quantile formula worked by hand, and streaming false-positive rates."""

import json
import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from ganlet.runtime.thresholds import (
    REGULAR_SHAPE,
    PotThreshold,
    RollingRobustThreshold,
    StaticThreshold,
    calibrate_policy,
    fit_gpd,
    gpd_loglik,
    make_threshold,
    pot_quantile,
    tail_fit,
    threshold_from_state,
)


def test_rolling_matches_pandas_and_scipy():
    rng = np.random.default_rng(0)
    scores = rng.gamma(2.0, 1.0, size=400)
    window, k, min_count, level0 = 50, 3.0, 10, 7.5
    thr = RollingRobustThreshold(level0=level0, window=window, k=k, min_count=min_count)
    got = []
    for s in scores:  # the buffer's arithmetic: every score absorbed
        got.append(thr.level)
        thr.absorb(s)
    got = np.array(got)

    s = pd.Series(scores)
    roll = s.rolling(window, min_periods=min_count)
    # reference: pandas Series.rolling(...).median(); shift(1) because the trailing buffer
    # excludes the current score
    med = roll.median().shift(1)
    # reference: scipy.stats.median_abs_deviation(scale="normal") (= 1.4826 * MAD)
    mad = roll.apply(lambda a: stats.median_abs_deviation(a, scale="normal"), raw=True).shift(1)
    expected = (med + k * mad).fillna(level0).to_numpy()
    np.testing.assert_allclose(got, expected, rtol=1e-12)
    assert np.all(got[:min_count] == level0)


def test_rolling_floor_and_nonfinite_scores():
    thr = RollingRobustThreshold(level0=5.0, window=8, k=6.0, min_count=4, floor=2.0)
    for _ in range(8):
        thr.update(1.0)  # constant scores: MAD = 0, median + k*MAD = 1.0 -> the floor holds
    assert thr.level == 2.0
    before = thr.state()
    assert thr.update(float("nan")) == 2.0
    assert thr.state() == before  # NaN is not absorbed


def draw_gpd(rng, xi, sigma, size):
    # inverse CDF of the GPD; reference: scipy.stats.genpareto.ppf gives the same values
    u = rng.uniform(size=size)
    y = sigma / xi * ((1 - u) ** (-xi) - 1) if xi != 0 else -sigma * np.log1p(-u)
    np.testing.assert_allclose(y, stats.genpareto.ppf(u, xi, scale=sigma), rtol=1e-9)
    return y


@pytest.mark.parametrize("xi_true,sigma_true", [(0.25, 1.5), (-0.2, 2.0), (0.0, 0.7)])
def test_fit_gpd_matches_scipy(xi_true, sigma_true):
    rng = np.random.default_rng(42)
    y = draw_gpd(rng, xi_true, sigma_true, 1500)
    xi, sigma = fit_gpd(y)
    # reference: scipy.stats.genpareto.fit with the location fixed at 0
    xi_s, _, sigma_s = stats.genpareto.fit(y, floc=0)
    assert abs(xi - xi_s) < 0.01
    assert abs(sigma - sigma_s) / sigma_s < 0.01
    ll_ours = gpd_loglik(y, xi, sigma)
    ll_scipy = float(np.sum(stats.genpareto.logpdf(y, xi_s, scale=sigma_s)))
    # reference: scipy.stats.genpareto.logpdf; our log-likelihood agrees with scipy's ...
    assert ll_ours == pytest.approx(
        float(np.sum(stats.genpareto.logpdf(y, xi, scale=sigma))), rel=1e-9
    )
    # ... and our maximum is at least as high as scipy's optimiser's
    assert ll_ours >= ll_scipy - 1e-6 * abs(ll_scipy)
    # and the estimate is near the truth (1500 samples; tolerance from the MLE's spread)
    assert abs(xi - xi_true) < 0.1
    assert abs(sigma - sigma_true) / sigma_true < 0.15


@pytest.mark.parametrize("xi_true", [0.25, -0.2])
def test_a_tail_heavier_than_exponential_is_extrapolated_as_exponential(xi_true):
    rng = np.random.default_rng(7)
    y = draw_gpd(rng, xi_true, 1.0, 1500)
    xi, sigma = tail_fit(y)
    if fit_gpd(y)[0] > 0:
        # reference: the exponential distribution's maximum-likelihood scale is the sample mean
        # (scipy.stats.expon.fit with the location fixed at 0)
        assert (xi, sigma) == (0.0, pytest.approx(stats.expon.fit(y, floc=0)[1], rel=1e-12))
    else:
        assert (xi, sigma) == fit_gpd(y)     # a lighter tail keeps its fit
    # so a pot level far past the data (a risk 1e-4 of the peaks' rate) is the exponential
    # tail's where the fit is heavier: with xi = 0.25 the GPD's own level is over 3 times out
    thr = PotThreshold(q=1e-6, t=0.0, peaks=list(y), n=15000, max_peaks=len(y))
    assert thr.level == pytest.approx(pot_quantile(0.0, xi, sigma, 1e-6, 15000, 1500))
    if xi_true > 0:
        assert pot_quantile(0.0, *fit_gpd(y), 1e-6, 15000, 1500) > 3 * thr.level


def test_a_shape_too_far_below_zero_is_extrapolated_as_exponential():
    # A normal score whose law is known: the root mean square of 8 Gaussian errors, sqrt of a
    # chi-square with 8 degrees of freedom over 8 (reference: scipy.stats.chi). From 400
    # calibration scores, pot keeps ten peaks; over many draws, about half the shape fits fall
    # at or below REGULAR_SHAPE, most at the degenerate -1 whose level is the largest score.
    # The true chance that normal running passes the level is read from scipy: with the fitted
    # shape it was hundreds of times the budget; extrapolated as exponential, below it.
    q = 1e-5
    fitted, kept = [], []
    for seed in range(60):
        scores = stats.chi.rvs(8, size=400, random_state=seed) / np.sqrt(8)
        policy = calibrate_policy("pot", scores, q=q)
        peaks = np.asarray(policy["peaks"])
        xi, sigma = fit_gpd(peaks)
        if xi > REGULAR_SHAPE:
            if xi <= 0:
                assert tail_fit(peaks) == (xi, sigma)  # a lighter tail that can be estimated
            continue
        # reference: the exponential ML scale is the mean excess (scipy.stats.expon.fit)
        assert tail_fit(peaks) == (0.0, pytest.approx(stats.expon.fit(peaks, floc=0)[1]))
        args = (policy["t"], policy["q"], policy["n"], policy["n_peaks"])
        level = make_threshold(policy).level
        assert level == pytest.approx(pot_quantile(args[0], 0.0, peaks.mean(), *args[1:]))
        fitted.append(stats.chi.sf(pot_quantile(args[0], xi, sigma, *args[1:]) * np.sqrt(8), 8))
        kept.append(stats.chi.sf(level * np.sqrt(8), 8))
    assert len(fitted) >= 20
    assert np.median(fitted) > 50 * q and np.median(kept) < q


def test_fit_gpd_degenerate_inputs():
    # too few or identical excesses: exponential MLE, sigma = mean (reference: exponential MLE)
    assert fit_gpd(np.array([1.0, 3.0])) == (0.0, 2.0)
    assert fit_gpd(np.array([2.0, 2.0, 2.0, 2.0])) == (0.0, 2.0)
    with pytest.raises(ValueError):
        fit_gpd(np.array([]))
    with pytest.raises(ValueError):
        fit_gpd(np.array([1.0, -1.0, 2.0]))


def test_pot_quantile_worked_example():
    # Worked by hand from the SPOT paper's formula (Siffer et al., KDD 2017, eq. for z_q):
    #   z_q = t + sigma/xi * ((q*n/Nt)^(-xi) - 1);  t = 1, sigma = 2, q = 1e-3, n = 1000, Nt = 4
    #   so q*n/Nt = 1/4.
    #   xi = 0.5:  (1/4)^(-0.5) = 2    -> z = 1 + 4 * (2 - 1)      = 5
    #   xi = -0.5: (1/4)^(0.5)  = 0.5  -> z = 1 - 4 * (0.5 - 1)    = 3
    #   xi = 0:    z = t - sigma * ln(1/4) = 1 + 2 ln 4            = 3.772588722...
    assert pot_quantile(1.0, 0.5, 2.0, 1e-3, 1000, 4) == pytest.approx(5.0, rel=1e-12)
    assert pot_quantile(1.0, -0.5, 2.0, 1e-3, 1000, 4) == pytest.approx(3.0, rel=1e-12)
    assert pot_quantile(1.0, 0.0, 2.0, 1e-3, 1000, 4) == pytest.approx(
        1 + 2 * math.log(4), rel=1e-12
    )
    # the xi -> 0 limit is continuous (reference: the same formula, limit worked by hand)
    assert pot_quantile(1.0, 1e-9, 2.0, 1e-3, 1000, 4) == pytest.approx(
        1 + 2 * math.log(4), rel=1e-8
    )


@pytest.mark.parametrize("dist,q", [("exponential", 1e-3), ("normal", 1e-2)])
def test_pot_streaming_false_positive_rate(dist, q):
    rng = np.random.default_rng(7)
    draw = rng.exponential if dist == "exponential" else rng.standard_normal
    calib, stream = draw(size=5000), draw(size=30000)
    thr = make_threshold(calibrate_policy("pot", calib, q=q))
    flagged = sum(s > thr.update(s) for s in stream)
    rate = flagged / stream.size
    # stationary data: the flag rate is the risk q to within a factor of 3 (order of magnitude)
    assert q / 3 < rate < 3 * q, rate
    # reference: the true (1 - q) quantile of the distribution, scipy.stats
    true_z = stats.expon.ppf(1 - q) if dist == "exponential" else stats.norm.ppf(1 - q)
    assert abs(thr.level - true_z) / true_z < 0.15


def test_pot_absorbs_peaks_and_not_flagged_scores():
    rng = np.random.default_rng(3)
    policy = calibrate_policy("pot", rng.exponential(size=2000), q=1e-3, refit_every=2)
    thr = make_threshold(policy)
    n0, peaks0 = thr.n, thr.n_peaks
    z = thr.level
    assert thr.update(z + 10.0) == z  # flagged: not absorbed
    assert (thr.n, thr.n_peaks) == (n0, peaks0)
    assert thr.update(thr.t / 2) == z  # below t: n counts it
    assert (thr.n, thr.n_peaks) == (n0 + 1, peaks0)
    fit0 = (thr.xi, thr.sigma)
    thr.update(thr.t + 0.1)  # first new peak: refit_every=2, fit unchanged
    assert thr.n_peaks == peaks0 + 1 and (thr.xi, thr.sigma) == fit0
    thr.update(thr.t + 0.2)  # second: refit on the updated peaks
    assert (thr.xi, thr.sigma) == tail_fit(np.array(thr.peaks))
    assert thr.peaks[-2:] == pytest.approx([0.1, 0.2])


def test_a_short_calibration_tail_is_not_refitted_on_a_few_stream_peaks():
    """A few hundred calibration scores give about ten peaks; under the default policy the
    stream's first peaks (here 40 scores between t and the level: a fault's onset still below
    it) are counted (the exceedance rate) but leave the tail's fitted shape and scale as
    calibrated, until as many new peaks as the fit holds have come. With a refit on every peak
    (refit_every=1, the old default) the fit follows the onset: its own shape swings from 0.3
    (given the exponential tail, tail_fit) to about -0.9, a shape tail_fit does not believe
    (REGULAR_SHAPE), and the exponential scale of the onset's wider excesses more than doubles
    the level (before REGULAR_SHAPE the shape went to -1 and the level fell by a quarter:
    either way, a few onset scores moved it)."""
    rng = np.random.default_rng(5)
    cal = rng.exponential(size=370)
    default, every = (make_threshold(calibrate_policy("pot", cal, q=1e-4, **o))
                      for o in ({}, {"refit_every": 1}))
    assert default.refit_every == default.max_peaks == 1000 and len(default.peaks) <= 11
    level0, peaks0, fit0 = default.level, default.n_peaks, (default.xi, default.sigma)
    assert fit_gpd(np.array(cal[cal > default.t] - default.t))[0] > 0.25   # exponential data
    assert fit0 == tail_fit(np.array(cal[cal > default.t] - default.t)) and fit0[0] == 0.0
    for s in np.linspace(default.t + 0.05, level0 - 0.01, 40):
        default.update(s)
        every.update(s)
    assert default.n_peaks == peaks0 + 40   # every onset score absorbed, none flagged
    assert (default.xi, default.sigma) == fit0
    assert fit_gpd(np.asarray(every.peaks))[0] < REGULAR_SHAPE
    assert every.level > 2 * level0 and default.level < 1.2 * level0


def test_pot_max_peaks_keeps_most_recent():
    peaks = [float(v) for v in np.arange(1, 21)]
    thr = PotThreshold(q=1e-3, t=0.0, peaks=peaks, n=1000, max_peaks=5)
    assert thr.peaks == peaks[-5:]
    assert thr.n_peaks == 20  # the exceedance rate still counts every peak


def stream_for_roundtrip(rng):
    s = rng.exponential(size=600)
    s[200:230] += 15.0  # an anomaly stretch, so flagged scores are in the mix
    s[400] = float("nan")
    return s


@pytest.mark.parametrize("kind", ["static", "rolling", "pot"])
def test_state_round_trip(kind):
    rng = np.random.default_rng(11)
    opts = {"rolling": {"window": 64, "min_count": 16}, "pot": {"refit_every": 3, "max_peaks": 80}}
    policy = calibrate_policy(kind, rng.exponential(size=3000), **opts.get(kind, {}))
    json.dumps(policy)  # the policy is plain JSON
    thr = make_threshold(policy)
    stream = stream_for_roundtrip(rng)
    for s in stream[:300]:
        thr.update(s)
    saved = json.loads(json.dumps(thr.state(), allow_nan=False))
    restored = threshold_from_state(saved)
    assert type(restored) is type(thr)
    assert restored.state() == thr.state()
    a = [thr.update(s) for s in stream[300:]]
    b = [restored.update(s) for s in stream[300:]]
    assert a == b
    assert restored.state() == thr.state()
    if kind != "static":
        assert len(set(a)) > 1  # the threshold actually moved while streaming


def test_calibrate_static_and_rolling():
    scores = np.random.default_rng(5).gamma(2.0, 1.0, size=1000)
    # reference: numpy.quantile (linear interpolation)
    p = calibrate_policy("static", scores, quantile=0.99, margin=1.2)
    assert p == {"kind": "static", "level": pytest.approx(np.quantile(scores, 0.99) * 1.2)}
    assert isinstance(make_threshold(p), StaticThreshold)
    r = calibrate_policy("rolling", scores)
    assert r["level0"] == pytest.approx(np.quantile(scores, 0.995))
    assert r["k"] == 6.0
    assert isinstance(make_threshold(r), RollingRobustThreshold)
    pot = calibrate_policy("pot", scores)
    assert pot["t"] == pytest.approx(np.quantile(scores, 0.98))
    assert pot["n"] == 1000 and len(pot["peaks"]) == pot["n_peaks"] == 20
    assert min(pot["peaks"]) > 0


@pytest.mark.parametrize(
    "policy,message",
    [
        ({"level": 1.0}, "unknown threshold kind"),
        ({"kind": "median"}, "unknown threshold kind"),
        ({"kind": "static"}, "missing"),
        ({"kind": "static", "level": 1.0, "lvl": 2}, "unknown keys"),
        ({"kind": "static", "level": float("nan")}, "finite"),
        ({"kind": "rolling", "level0": 1.0, "window": 10, "min_count": 20}, "min_count"),
        ({"kind": "rolling", "level0": 1.0, "window": 10.5}, "integer"),
        ({"kind": "pot", "q": 1.5, "t": 0.0, "peaks": [1, 2, 3], "n": 100}, "between 0 and 1"),
        ({"kind": "pot", "q": 0.1, "t": 0.0, "peaks": [1, 2, 3], "n": 100}, "exceedance rate"),
        ({"kind": "pot", "q": 1e-3, "t": 0.0, "peaks": [1], "n": 100}, "at least 3 peaks"),
    ],
)
def test_make_threshold_validation(policy, message):
    with pytest.raises(ValueError, match=message):
        make_threshold(policy)


def test_calibrate_rejects_bad_input():
    with pytest.raises(ValueError, match="NaN"):
        calibrate_policy("static", np.array([1.0, np.nan, 2.0]))
    with pytest.raises(ValueError, match="unknown options"):
        calibrate_policy("static", np.ones(10), quantle=0.9)
    with pytest.raises(ValueError, match="unknown threshold kind"):
        calibrate_policy("spot", np.ones(10))


def test_pot_state_restores_after_a_long_quiet_stream():
    """A saved POT state must restore even when the exceedance rate has fallen below q.

    Regression: from_state used to re-run the calibration-time check q < n_peaks / n, so a
    gateway that had seen a long quiet run could not restart from its checkpoint.
    """
    rng = np.random.default_rng(3)
    pot = make_threshold(calibrate_policy("pot", rng.exponential(1.0, 500)))
    for _ in range(30_000):
        pot.update(0.0)          # far below t: n grows, n_peaks does not
    assert pot.q >= pot.n_peaks / pot.n
    restored = PotThreshold.from_state(json.loads(json.dumps(pot.state())))
    assert restored.level == pot.level
    assert restored.update(0.5) == pot.update(0.5)


@pytest.mark.parametrize("kind", ["static", "rolling", "pot"])
def test_a_long_run_above_the_level_keeps_alerting(kind):
    """A fault that lasts far longer than the policy's memory must not become its new normal:
    neither the policy (flagged scores are not absorbed) nor the Judge (nothing inside an open
    alert is absorbed) lets the level climb after it. Before, `rolling` absorbed every score and
    closed a long fault once its median caught up."""
    from ganlet.runtime.detector import Judge

    rng = np.random.default_rng(7)
    normal = rng.gamma(2.0, 1.0, size=600)
    policy = calibrate_policy(kind, normal, **({"window": 64, "min_count": 16}
                                               if kind == "rolling" else {}))
    judge = Judge("b", [], [], policy, {"warmup_hops": 0, "min_hops": 3, "close_ratio": 0.8,
                                        "cooldown_hops": 4})
    for s in rng.gamma(2.0, 1.0, size=200):   # normal running first
        judge.step(0.0, float(s))
    level_before = judge.threshold.level
    opened = []
    for _ in range(2000):                     # then a fault 10x the level, 10 windows long
        judge.step(0.0, 10.0 * level_before * (1 + 0.1 * rng.random()))
        opened.append(judge.is_open)
    assert all(opened[2:]), f"{kind}: the alert closed during the fault"
    assert judge.threshold.level == pytest.approx(level_before)
