"""The CUSUM of the log score beside the threshold (runtime/cusum.py): its recursion against the
closed form of Page's CUSUM, what it adds (a small held rise alerts; no single hop's level sees
it), the false-alarm budget it shares with the pot threshold on scores of a known distribution,
when compile arms it, its cooldown and reset rules, that it counts a window holding a change of
operating state as its median (and is fitted so), and that a detector holding it resumes
exactly and refuses a tampered state or section."""

import json

import numpy as np
import pytest
import runtime_fixtures as fx

from ganlet.compile.calibrate import threshold_policy
from ganlet.runtime.cusum import (
    CAP,
    MIN_EXCURSIONS,
    STATE_CHANGE_KEY,
    Cusum,
    calibrate_cusum,
    excursion_peaks,
)
from ganlet.runtime.detector import Detector, Judge
from ganlet.runtime.manifest import BundleError, load_bundle
from ganlet.runtime.score import ScoreRule, piece_means, score_section
from ganlet.runtime.scorer import make_scorer
from ganlet.runtime.thresholds import make_threshold

ALERTING = {"warmup_hops": 0, "min_hops": 3, "close_ratio": 0.95, "cooldown_hops": 8}


def _closed_form(steps: np.ndarray) -> np.ndarray:
    """Page's CUSUM S_n = max(0, S_{n-1} + z_n), S_0 = 0, written as the cumulative sum minus
    its running minimum (taken with 0): S_n = X_n - min(0, min_k<=n X_k), X = cumsum(z)
    (Lindley's recursion, from memory; it holds because the max(0, .) restarts the sum at each
    new minimum)."""
    x = np.cumsum(steps)
    return x - np.minimum(0.0, np.minimum.accumulate(x))


def test_the_evidence_is_pages_cusum_of_the_log_score_and_the_cap_holds():
    rng = np.random.default_rng(3)
    scores = rng.gamma(2.0, 1.0, size=2000) * np.where(np.arange(2000) % 500 < 60, 3.0, 1.0)
    median, allowance = float(np.median(scores)), 0.6
    steps = np.log(scores / median) - allowance
    uncapped = Cusum(median, allowance, limit=1e9)
    got = []
    for s in scores:
        uncapped.add(float(s))
        got.append(uncapped.evidence)
    np.testing.assert_allclose(got, _closed_form(steps), rtol=1e-9, atol=1e-9)
    # each excursion's peak: the closed form's maximum between two of its returns to 0
    closed = np.concatenate([[0.0], _closed_form(steps)])  # S_0 = 0
    zeros = np.flatnonzero(closed == 0)
    want = [closed[a:b].max() for a, b in zip(zeros[:-1], zeros[1:]) if b > a + 1]
    assert excursion_peaks(scores, median, allowance) == pytest.approx(want)
    capped = Cusum(median, allowance, limit=2.0)
    tops = []
    for s in scores:
        capped.add(float(s))
        tops.append(capped.evidence)
    assert max(tops) == pytest.approx(CAP * 2.0)


def _alert_events(policy: dict, scores) -> list:
    """(hop, event) of every alert event a Judge gives on `scores`."""
    judge = Judge("b", ["a"], ["u"], policy, ALERTING)
    return [(hop, e) for hop, s in enumerate(scores) for e in judge.step(0.0, float(s))
            if e["event"] != "score"]


def test_a_small_held_rise_alerts_only_with_the_cusum_and_closes_after_it():
    """The case it exists for: a fault that holds the score at 2x its normal level for a long
    time (hops 400-599), far under a level set for a rare single hop."""
    rng = np.random.default_rng(5)
    scores = rng.gamma(8.0, 1 / 8.0, size=1000) * np.where((np.arange(1000) >= 400)
                                                           & (np.arange(1000) < 600), 2.0, 1.0)
    policy = {"kind": "static", "level": 6.0}
    assert scores.max() < 6.0, "precondition: no single hop passes the level"
    assert _alert_events(policy, scores) == []
    events = _alert_events({**policy, "cusum": {"median": 1.0, "allowance": 0.3,
                                                "limit": 8.0}}, scores)
    assert [e["event"] for _, e in events] == ["alert_opened", "alert_closed"]
    assert events[0][1]["opened_by"] == "cusum"
    # evidence grows by about log 2 - 0.06 - 0.3 = 0.33 a hop (E log of the gamma(8) / 8 is
    # -0.06): past the limit of 8 in ~24 hops
    assert 400 < events[0][0] < 440
    # capped at 2 x 8 and losing about 0.3 + 0.06 a normal hop, it is below 0.95 x 8 in ~23
    assert 600 < events[1][0] < 640


def test_no_evidence_is_gathered_in_the_cooldown_and_it_restarts_at_a_close():
    judge = Judge("b", ["a"], ["u"], {"kind": "static", "level": 4.0,
                                      "cusum": {"median": 1.0, "allowance": 0.3,
                                                "limit": 8.0}}, ALERTING)
    for _ in range(5):  # a spike opens an alert by the score
        judge.step(0.0, 10.0)
    assert judge.alert["opened_by"] == "score" and judge.cusum.evidence > 0
    closed = judge.step(0.0, 1.0)
    assert any(e["event"] == "alert_closed" for e in closed), "the score alone closes it"
    assert judge.cusum.evidence == 0.0
    for _ in range(ALERTING["cooldown_hops"]):  # high scores in the cooldown add nothing
        judge.step(0.0, 3.0)
        assert judge.cusum.evidence == 0.0
    judge.step(0.0, 3.0)
    assert judge.cusum.evidence == pytest.approx(np.log(3.0) - 0.3)


def test_a_drift_pauses_the_cusum_and_a_crept_alert_keeps_no_channel_out_of_drift():
    """A warming machine: the score creeps to twice its median, the CUSUM opens an alert, and
    only then has the warming channel been outside its envelope long enough to be a drift.
    A CUSUM alert keeps no channel out of drift (a score alert does), and while a channel is
    re-centred the CUSUM gathers nothing and drops what it held, so the alert closes once the
    score is back under the level. Without the pause the same hops hold it open."""
    policy = {"kind": "static", "level": 6.0,
              "cusum": {"median": 1.0, "allowance": 0.3, "limit": 8.0}}
    parts = np.array([3.0, 0.2])          # the warming channel carries the score

    def crept(drifting: bool) -> tuple:
        judge = Judge("b", ["warm", "other"], ["u", "u"], policy, ALERTING)
        for _ in range(60):
            judge.step(0.0, 2.0, parts)
        assert judge.alert is not None and judge.alert["opened_by"] == "cusum"
        blocked = judge.alert_channels().copy()
        closed = [hop for hop in range(60) for e in judge.step(0.0, 2.0, parts, drifting)
                  if e["event"] == "alert_closed"]
        return blocked, closed, judge.cusum.evidence

    blocked, closed, evidence = crept(drifting=True)
    assert not blocked.any()
    assert closed == [0] and evidence == 0.0
    _, closed, evidence = crept(drifting=False)
    assert closed == [] and evidence == pytest.approx(2 * 8.0)   # held at its cap
    # an alert the score opened still keeps its channel out of drift
    judge = Judge("b", ["warm", "other"], ["u", "u"], policy, ALERTING)
    for _ in range(5):
        judge.step(0.0, 10.0, parts)
    assert judge.alert["opened_by"] == "score"
    assert judge.alert_channels().tolist() == [True, False]


def _known_scores(rng, n):
    """gamma(2) scores (a chi-square-like score), AR(1) in the log as a window's correlated
    scores are."""
    z = np.zeros(n)
    e = rng.standard_normal(n)
    for i in range(1, n):
        z[i] = 0.5 * z[i - 1] + e[i] * np.sqrt(1 - 0.25)
    return np.exp(0.5 * z) * rng.gamma(2.0, 1.0, size=n)


def _passage_rate(policy, scores, changes=None) -> float:
    """The share of hops on which a passage of the threshold or the CUSUM starts."""
    level = make_threshold(policy).level
    cusum = Cusum.from_policy(policy)
    changes = np.zeros(len(scores), bool) if changes is None else changes
    above = []
    for s, change in zip(scores, changes):
        cusum.add(float(s), bool(change))
        above.append(cusum.judged(float(s), level) > level)
    above = np.asarray(above)
    return (int(above[0]) + int((above[1:] & ~above[:-1]).sum())) / len(above)


@pytest.mark.parametrize("seed", [0, 1])
def test_the_threshold_and_the_cusum_together_keep_the_budget(seed):
    """Calibrated on 40,000 scores of a known distribution for a risk of 1e-3 a hop, 200,000
    fresh scores from the same process start a passage of either level on about 1e-3 of the
    hops, not twice that: the two share the budget, half each."""
    rng = np.random.default_rng(seed)
    risk = 1e-3
    policy, report = threshold_policy("pot", [_known_scores(rng, 20_000),
                                              _known_scores(rng, 20_000)], risk)
    assert report["section"] is not None and policy["cusum"] == report["section"]
    assert STATE_CHANGE_KEY not in policy["cusum"], "no state changes given: every hop counts"
    rate = _passage_rate(policy, _known_scores(rng, 200_000))
    print(f"\nseed {seed}: passages started on {rate:.2e} of the hops for a risk of {risk:.0e}")
    assert 0.3 * risk < rate < 1.5 * risk


def _with_state_changes(rng, n, every=250, transient=12, flagged=32):
    """The known scores of a process that changes state every `every` hops: a transient of
    `transient` hops at 4x the score, inside the `flagged` hops whose windows hold the change."""
    phase = np.arange(n) % every
    return _known_scores(rng, n) * np.where(phase < transient, 4.0, 1.0), phase < flagged


@pytest.mark.parametrize("seed", [0, 1])
def test_state_changes_leave_the_limit_to_steady_running_and_keep_the_budget(seed):
    """A machine that starts, stops or changes duty every 250 hops, with a 12-hop transient at
    4x the normal score (the largest normal error there is). Fitted with the windows that hold
    a change counted as the median, the limit is set by steady running: lower than with the
    transients counted, so a held rise of 3x in steady running is found sooner; and fresh
    scores of the same process still start a passage of either level on about the budget's risk
    (1e-3 a hop; measured 8.6e-4 for both seeds)."""
    rng = np.random.default_rng(seed)
    risk = 1e-3
    history = [_with_state_changes(rng, 20_000) for _ in range(2)]
    scores, changes = [h[0] for h in history], [h[1] for h in history]
    counted, _ = threshold_policy("pot", scores, risk)
    steady, report = threshold_policy("pot", scores, risk, changes)
    assert steady["cusum"][STATE_CHANGE_KEY] is True and report["excursions"] >= MIN_EXCURSIONS
    assert steady["cusum"]["median"] == counted["cusum"]["median"]       # every hop's
    assert steady["cusum"]["allowance"] == counted["cusum"]["allowance"]
    assert steady["cusum"]["limit"] < 0.7 * counted["cusum"]["limit"]
    # the excursions are those of the series with each such window's score at the median
    m, a = steady["cusum"]["median"], steady["cusum"]["allowance"]
    assert report["excursions"] == sum(len(excursion_peaks(np.where(c, m, s), m, a))
                                       for s, c in zip(scores, changes))
    fresh, fresh_changes = _with_state_changes(rng, 200_000)
    rate = _passage_rate(steady, fresh, fresh_changes)
    print(f"\nseed {seed}: limit {steady['cusum']['limit']:.1f} (transients counted: "
          f"{counted['cusum']['limit']:.1f}); passages on {rate:.2e} of the hops")
    assert 0.3 * risk < rate < 1.5 * risk
    rise = _known_scores(rng, 400) * 3.0          # a held rise, in steady running

    def hops_to_find(policy):
        cusum = Cusum.from_policy(policy)
        for hop, s in enumerate(rise):
            cusum.add(float(s))
            if cusum.evidence > cusum.limit:
                return hop
        return len(rise)

    assert hops_to_find(steady) < hops_to_find(counted)


def test_a_state_change_counts_as_the_median_only_when_the_section_says_so():
    """A bundle from before the rule (no key) counts every hop's score, as it did; with the key
    a window holding a change of operating state counts as a hop at the median, whatever its
    score: the evidence falls by the allowance, so a transient neither adds evidence nor holds
    an alert open, while the threshold still judges its score."""
    section = {"median": 1.0, "allowance": 0.3, "limit": 8.0}
    for flag, counts in ((None, True), (False, True), (True, False)):
        cusum = Cusum.from_policy({"kind": "static", "level": 4.0,
                                   "cusum": section if flag is None
                                   else {**section, STATE_CHANGE_KEY: flag}})
        cusum.add(3.0)
        before = cusum.evidence
        cusum.add(3.0, state_change=True)
        want = before + np.log(3.0) - 0.3 if counts else before - 0.3
        assert cusum.evidence == pytest.approx(want)
    judge = Judge("b", ["a"], ["u"], {"kind": "static", "level": 4.0,
                                      "cusum": {**section, STATE_CHANGE_KEY: True}}, ALERTING)
    for _ in range(40):
        judge.step(0.0, 3.0, state_change=True)     # a long transient under the level
    assert judge.cusum.evidence == 0.0 and judge.alert is None
    for _ in range(30):
        judge.step(0.0, 3.0)                        # a held rise in steady running
    assert judge.alert is not None and judge.alert["opened_by"] == "cusum"
    closed = [hop for hop in range(30) for e in judge.step(0.0, 3.0, state_change=True)
              if e["event"] == "alert_closed"]
    assert closed, "a state change after the rise does not hold its alert open"
    for _ in range(ALERTING["cooldown_hops"] + 1):
        judge.step(0.0, 1.0)
    for _ in range(3):
        judge.step(0.0, 10.0, state_change=True)    # one above the level is the threshold's
    assert judge.alert is not None and judge.alert["opened_by"] == "score"


def test_a_window_holds_a_state_change_when_a_piece_sits_in_another_regime():
    """Two regimes (off at 0, running at 5): a start in the newest piece, in the oldest, a
    window all off or all running; a rule with one regime never sees a change."""
    two = ScoreRule(score_section([[0.0, 0.0], [5.0, 5.0]], [[1.0, 1.0], [1.0, 1.0]], "rms", 8,
                                  "mse+offset"))
    windows = np.zeros((4, 32, 2))
    windows[0, -8:] = 5.0      # started in the scored steps
    windows[1, 8:] = 5.0       # started in the oldest piece, running since
    windows[3] = 5.0
    pieces = piece_means(windows, 8)
    assert pieces.shape == (4, 4, 2)
    np.testing.assert_allclose(pieces[:, -1], windows[:, -8:].mean(axis=1))
    assert two.state_changes(windows.mean(axis=1), pieces).tolist() == [True, True, False, False]
    one = ScoreRule(score_section([[0.0, 0.0]], [[1.0, 1.0]], "rms", 8, "mse+offset"))
    assert not one.state_changes(windows.mean(axis=1), pieces).any()
    # a window not a whole number of pieces: the oldest leftover steps are in no piece
    assert piece_means(np.zeros((1, 30, 2)), 8).shape == (1, 3, 2)


def test_compile_arms_the_cusum_only_where_its_limit_can_be_fitted():
    rng = np.random.default_rng(1)
    short = [rng.gamma(2.0, 1.0, size=60)]
    long = [rng.gamma(2.0, 1.0, size=4000)]
    policy, report = threshold_policy("pot", short, 1e-3)
    assert "cusum" not in policy and report["excursions"] < MIN_EXCURSIONS
    assert f"its limit needs {MIN_EXCURSIONS}" in report["why_off"]
    policy, report = threshold_policy("pot", long, 1e-3)
    assert policy["cusum"]["limit"] > 0 and report["excursions"] >= MIN_EXCURSIONS
    # the pot threshold takes half the risk when the CUSUM holds the other half
    assert policy["q"] == pytest.approx(1e-3 / 2)
    assert "cusum" not in threshold_policy("static", long, None)[0]
    signed = calibrate_cusum([rng.standard_normal(4000)], 1e-3)  # not a ratio scale
    assert signed["section"] is None and "positive" in signed["why_off"]


@pytest.mark.parametrize("section", [{"median": 0.0, "allowance": 0.3, "limit": 8.0},
                                     {"median": 1.0, "allowance": -0.1, "limit": 8.0},
                                     {"median": 1.0, "allowance": 0.3, "limit": float("nan")},
                                     {"median": 1.0, "allowance": 0.3},
                                     {"median": 1.0, "allowance": 0.3, "limit": 8.0, "cap": 2},
                                     {"median": 1.0, "allowance": 0.3, "limit": 8.0,
                                      STATE_CHANGE_KEY: "yes"},
                                     [1.0, 0.3, 8.0]])
def test_a_malformed_cusum_section_is_refused_when_the_bundle_loads(tmp_path, section):
    with pytest.raises(ValueError, match="cusum"):
        Cusum.from_policy({"kind": "static", "level": 1.0, "cusum": section})
    with pytest.raises(BundleError, match="manifest: threshold: .*cusum"):
        load_bundle(fx.build_bundle(tmp_path / "b", onnx_model=False, threshold={
            "kind": "static", "level": 1.0, "cusum": section}), skip_signature=True)


def test_a_detector_with_the_cusum_resumes_from_its_state_exactly(tmp_path):
    values = fx.raw_values(900, seed=4, anomalies=[(500, 60, 1, 1.5)])
    calibration = fx.direct_scores(fx.build_bundle(tmp_path / "probe", onnx_model=False),
                                   fx.scaled(fx.raw_values(600, seed=99)), 16, 4)
    median = float(np.median(calibration))
    allowance = float(np.log(np.quantile(calibration, 0.9) / median))
    # single hops never reach the level; the fault's held rise gathers the CUSUM's evidence
    threshold = {"kind": "static", "level": float(np.quantile(calibration, 0.999) * 5),
                 "cusum": {"median": median, "allowance": allowance, "limit": 3.0}}
    bundle = load_bundle(fx.build_bundle(tmp_path / "b", threshold=threshold, onnx_model=False,
                                         alerting=ALERTING))

    def detector():
        return Detector(bundle, make_scorer(bundle, "numpy"))

    def feed(det, rows):
        return [e for k in rows for e in det.feed(float(fx.T0 + k), values[k])]

    whole = feed(detector(), range(len(values)))
    assert any(e["event"] == "alert_opened" and e["opened_by"] == "cusum"
               for e in whole), "precondition: the CUSUM opens an alert"
    first = detector()
    head = feed(first, range(530))            # stop inside the alert
    assert first.judge.is_open and first.judge.cusum.evidence > 0
    second = detector()
    second.restore(json.loads(json.dumps(first.state())))
    assert head + feed(second, range(530, len(values))) == whole
    for bad in (-1.0, CAP * 3.0 + 1.0, "1.0", [1.0], True):
        broken = json.loads(json.dumps(first.state()))
        broken["judge"]["cusum"] = bad
        with pytest.raises(ValueError, match="CUSUM"):
            detector().restore(broken)


def test_the_limit_is_never_below_an_excursion_the_normal_history_reached():
    """The history is normal: one long excursion in it (a warm-up, a rare state) must not be
    the alarm the limit allows. With a risk of 1e-3 a hop the tail's quantile falls below that
    excursion's peak; the limit is then the peak itself."""
    rng = np.random.default_rng(3)
    scores = _known_scores(rng, 20_000)
    scores[5_000:5_080] *= 4.0
    section = calibrate_cusum([scores], 1e-3)["section"]
    peaks = excursion_peaks(scores, section["median"], section["allowance"])
    assert max(peaks) > 3 * sorted(peaks)[-2]              # precondition: one stands out
    assert section["limit"] == max(peaks)
