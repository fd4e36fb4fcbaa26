"""Calibrate: the detector's settings fitted on the training data, as the gateway will see it.

Everything is measured by replaying the training rows through the gateway's own detector
(runtime.detector.Detector on an in-memory bundle) with the network that will score them (the
device's int8 student, or the teacher for `ganlet evaluate` on a model directory):

1. drift envelope: per channel, the lowest / highest window level (median) of the fit span (the
   levels the network learned) and the largest change of the window level over one window in
   the whole training span (runtime/drift.py);
2. operating regimes: k-means on the fit span's window means; k is the largest k <= K_MAX whose
   every regime holds at least MIN_REGIME_WINDOWS calibration windows and whose silhouette is at
   least SILHOUETTE_MIN, else one regime (runtime/score.py uses the nearest centre);
3. score scale: per regime and channel, the median RMS error over the calibration span's hops
   (a channel's error then reads "times its normal error in this regime"), raised for a channel
   whose normal error has a heavier top decile than the channels' typical one (regime_scale);
4. threshold: the policy fitted to the calibration span's scores; `pot` takes the risk per hop
   from the engineer's false-alarm budget (alarms per week on normal data); with a history long
   enough, a CUSUM of the log score beside it (runtime/cusum.py), the budget shared;
5. held readings: per channel, the longest run of identical readings the history makes
   plausible at a hundredth of the budget, for channels whose history fits that run model
   (runtime/held.py).
`detector_policy` (threshold, CUSUM and held readings) is also the rule `ganlet evaluate` gives
every method.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Optional

import numpy as np
from scipy.stats import spearmanr

from ganlet.compile.train import TrainedModel
from ganlet.runtime.alerts import default_alerting
from ganlet.runtime.cusum import STATE_CHANGE_KEY, calibrate_cusum, cusum_off
from ganlet.runtime.detector import Detector
from ganlet.runtime.drift import drift_section, window_level
from ganlet.runtime.held import RISK_SHARE, calibrate_held
from ganlet.runtime.lstm import Network
from ganlet.runtime.manifest import Bundle, build_manifest
from ganlet.runtime.score import ScoreRule, piece_means, score_section
from ganlet.runtime.thresholds import CUSUM_KEY, HELD_KEY, KINDS, calibrate_policy

SECONDS_PER_WEEK = 7 * 86400.0
# The engineer's false-alarm budget on normal data when none is given: one alarm per week per
# detector (common practice for an advisory monitor one person reviews; state your own with
# --false-alarms-per-week).
DEFAULT_ALARMS_PER_WEEK = 1.0
COMBINE = "rms"            # the score: root mean square of the channels' normalised errors
# The score reads the newest quarter of the window: the causal LSTMs reconstruct those steps
# with at least three quarters of a window of context, and a fault leaves the score a quarter
# window after it ends (measured on the tests' synthetic faults: ROC AUC 0.919 whole window,
# 0.957 newest quarter; issue 11's notes)
SCORED_FRACTION = 4
# The residual statistic: the energy of the scored steps' error plus its held offset
# (runtime/score.py). Measured on SKAB valve1 (teacher through the gateway's Detector, mean of 3
# seeds, F1 / FAR / ROC AUC): "mse" 0.713 / 0.192 / 0.777, "mse+offset" 0.726 / 0.173 / 0.797;
# the offset alone 0.710 / 0.144 / 0.782 (misses short spikes, which the energy term keeps).
STATISTIC = "mse+offset"
# What a drift does by default: re-centred onto the training range while it lasts (and reported
# once). Measured on held-out healthy data (SKAB anomaly-free, a rig warming up for an hour,
# benchmarks/bench_normal.py, seed 0): scored as it is (`report`), the drifting channels held
# one alert open for 98 % of the streamed time after training on 400 or 2,000 rows, which also
# hides any real fault meanwhile; re-centred, 7.2 % and 0.5 %. On SKAB valve1 (teacher through
# the gateway's Detector, mean of 3 seeds, with median levels and the pace check of
# runtime/drift.py) re-centring costs nothing in F1 and cuts false alarms: report F1 0.712 /
# FAR 0.322 / ROC AUC 0.794, recentre 0.713 / 0.192 / 0.777. Some faults that are slow
# departures get re-centred too; `--drift report` keeps scoring them for a machine that does
# not drift.
DRIFT_ACTION = "recentre"
# A channel that steps out of its training range (runtime/drift.py: outside its envelope for a
# window, further than the fastest training pace could have taken it, its margin taken off)
# alerts by default. Measured on SKAB valve1 (bundle through run.py stream, mean of 3 seeds, F1 /
# FAR / MAR): off 0.755 / 0.161 / 0.309, on 0.798 / 0.170 / 0.238; the fault the score never saw
# in file 4 (the flow one litre a minute low) is found. The demo's four seeds alert as before;
# SKAB's healthy rig gets one alert more after 400 training rows and none after 2,000 to 6,000.
ALERT_STEPS = True
K_MAX = 4                  # operating regimes a small pump, fan or compressor shows (off/low/high)
MIN_REGIME_WINDOWS = 30    # common practice: ~30 samples for a stable median per channel
SILHOUETTE_MIN = 0.5       # Kaufman & Rousseeuw: > 0.5 "reasonable structure" (from memory)
LEVEL_CHUNK = 4096         # windows per median call when fitting the drift envelope
FLOOR_FRACTION = 1e-3      # a regime's scale is at least this share of the channel's overall
                           # median error (a regime where a channel is reconstructed exactly)
# The normal error's tail that regime_scale compares across channels: its top decile (the same
# "normal top decile" as the CUSUM's allowance, runtime/cusum.py), a quantile the calibration
# span's 30 or more hops per regime can show. Measured with it (bundle through run.py stream):
# the demo's four seeds 14 -> 18 of 20 incidents, alerts outside them 3 -> 1; SKAB valve1 (mean
# of 3 seeds, F1 / FAR / MAR / ROC AUC) 0.798 / 0.170 / 0.238 / 0.821 -> 0.803 / 0.173 / 0.229 /
# 0.829; SKAB's healthy rig 11 -> 12 alerts over four training lengths.
TAIL_QUANTILE = 0.9


def risk_per_hop(alarms_per_week: float, period_s: float, hop: int) -> float:
    """The POT risk q for a budget: an alarm needs at least one hop over the level, so at most
    q x hops-per-week alarms a week are expected on normal data (runs of hops only lower it)."""
    if not alarms_per_week > 0:
        raise ValueError(f"--false-alarms-per-week must be > 0, got {alarms_per_week}")
    return float(alarms_per_week) * period_s * hop / SECONDS_PER_WEEK


def budget_record(alarms_per_week: float, risk: float, policy: dict, hop_s: float) -> dict:
    """The manifest's false_alarms section. `measurable_per_week`: the rarest alarm rate the n
    scores the threshold was fitted on (`tail_scores`: calibration and fit spans) can show, one
    in n + 1 hops (the chance that a new score from the same distribution beats all n); a
    budget below it rests on the tail model's extrapolation alone, which a short history cannot
    check (SKAB's 400-row files: 369 scores, so a budget of 1 a week at one score a second is
    1,600 times finer than they show)."""
    hops_per_week = SECONDS_PER_WEEK / hop_s
    pot = policy["kind"] == "pot"
    n = int(policy["n"]) if pot else None
    pot_risk = policy["q"] if pot else 0.0
    cusum_risk = pot_risk if CUSUM_KEY in policy else 0.0  # the CUSUM's share equals pot's
    held_risk = RISK_SHARE * risk if HELD_KEY in policy else 0.0  # at most, per hop
    return {"budget_per_week": float(alarms_per_week), "risk_per_hop": risk,
            "expected_per_week_at_most": (pot_risk + cusum_risk + held_risk) * hops_per_week
            if pot else None,
            "tail_scores": n,
            "measurable_per_week": hops_per_week / (n + 1) if pot else None}


NEEDS_POT = "it needs the pot threshold"


def threshold_policy(kind: str, pieces: list, risk: Optional[float],
                     state_changes: Optional[list] = None) -> tuple:
    """(the threshold section, its CUSUM report): `policy_for` on all the scores of `pieces`
    (normal scores, each piece in hop order), and for `pot` the CUSUM beside it
    (runtime/cusum.py) when the pieces show enough excursions to fit its limit. The two then
    share the risk, half each, so together they stay within the budget (an alarm needs one of
    them past its level: at most the sum of the two rates)."""
    scores = np.concatenate([np.asarray(p, np.float64) for p in pieces])
    if kind != "pot" or risk is None:
        return policy_for(kind, scores, risk), cusum_off(NEEDS_POT)
    cusum = calibrate_cusum(pieces, risk / 2, state_changes)
    if cusum["section"] is None:
        return policy_for(kind, scores, risk), cusum
    policy = policy_for(kind, scores, risk / 2)
    if policy["kind"] != "pot":  # too few scores for the tail: the static fallback, alone
        return policy_for(kind, scores, risk), cusum_off(NEEDS_POT, cusum["excursions"])
    return {**policy, CUSUM_KEY: cusum["section"]}, cusum


def detector_policy(kind: str, pieces: list, risk: float, history: Optional[np.ndarray],
                    hop: int, state_changes: Optional[list] = None):
    """(the threshold section, its CUSUM report, the held-reading report): the held-reading
    limits from the raw normal history [rows, channels] (runtime/held.py), whose share comes out
    of the budget, and `threshold_policy` on the scores for the rest. `ganlet evaluate` gives
    every method this rule. `state_changes`: per piece, the hops whose windows hold a change of
    operating state (runtime/score.py), which the CUSUM counts as its median."""
    held = (calibrate_held(history, risk / hop) if history is not None
            else {"section": None, "channels": []})  # a model directory without raw rows
    score_risk = risk * (1 - RISK_SHARE) if held["section"] is not None else risk
    policy, cusum = threshold_policy(kind, pieces, score_risk if kind == "pot" else None,
                                     state_changes)
    if held["section"] is not None:
        policy = {**policy, HELD_KEY: held["section"]}
    return policy, cusum, held


def tails_text(regimes: dict) -> str:
    """The channels whose score scale a heavy normal tail or the fit span raised, for the
    compile report."""
    def raised(key: str) -> str:
        big = sorted(((f, name) for name, f in regimes.get(key, {}).items()
                      if round(f, 1) > 1.0), reverse=True)
        return ", ".join(f"{n} at {f:.1f}x" for f, n in big)

    tails, fit = raised("tail_factor"), raised("fit_factor")
    return ((f"; a heavy normal tail reads {tails} its median error (tail_matched_scale)"
             if tails else "")
            + (f"; the fit span's errors read {fit} the calibration span's (normal_scale)"
               if fit else ""))


def cusum_line(report: dict) -> str:
    """compile's line on the CUSUM (threshold_policy's report)."""
    if report["section"] is not None:
        steady = (" of steady running (a window holding a change of operating state counts "
                  "as normal)" if report["section"].get(STATE_CHANGE_KEY) else "")
        return (f"cusum: a rise held over many hops also alerts (evidence limit "
                f"{report['section']['limit']:.3g}, fitted on {report['excursions']} "
                f"excursions of the normal history{steady}); it shares the budget")
    return f"cusum: off; {report['why_off']}"


def held_line(report: dict) -> str:
    """compile's line on the held-reading check (calibrate_held's report, with the names)."""
    found, channels = report["channels"], report["names"]
    watched = [f"{c} {f['limit']}" for c, f in zip(channels, found) if f["limit"] is not None]
    not_watched = [f"{c} (runs of {f['longest']} in its history)"
                   for c, f in zip(channels, found) if f["limit"] is None]
    if not watched:
        return "held readings: no channel watched; every channel's history holds long runs " \
               "of identical readings"
    line = ("held readings: a reading repeated more times in a row than its limit alerts ("
            + ", ".join(watched) + ")")
    return line + ("; not watched: " + ", ".join(not_watched) if not_watched else "")


def policy_for(kind: str, scores: np.ndarray, risk: Optional[float] = None) -> dict:
    """A threshold policy of `kind` from calibration scores; for `pot`, `risk` (per hop) is the
    false-alarm budget's q. Too few scores for a tail fit give a static level at the largest
    calibration score (the policy's kind says so)."""
    if kind not in KINDS:
        raise ValueError(f"threshold {kind!r}: choose one of {', '.join(KINDS)}")
    s = np.asarray(scores, np.float64)
    s = s[np.isfinite(s)]
    if kind == "pot":
        try:
            return calibrate_policy("pot", s, **({} if risk is None else {"q": risk}))
        except ValueError:
            return calibrate_policy("static", s, quantile=1.0 - 1e-12)
    if kind == "rolling":
        return calibrate_policy("rolling", s, min_count=min(32, len(s)))
    return calibrate_policy(kind, s)


def agreement(reference: np.ndarray, other: np.ndarray) -> dict:
    """Spearman rank correlation (scipy.stats.spearmanr) and error figures of two score series."""
    reference = np.asarray(reference, np.float64)
    other = np.asarray(other, np.float64)
    err = np.abs(other - reference)
    rho = float(spearmanr(reference, other).statistic) if len(reference) > 2 else float("nan")
    return {"n": int(len(reference)), "spearman": rho, "max_abs_error": float(err.max()),
            "max_rel_error": float((err / np.maximum(np.abs(reference), 1e-12)).max()),
            "median_rel_error": float(np.median(err / np.maximum(np.abs(reference), 1e-12)))}


def network_scores(weights: dict, windows: np.ndarray, rule: Optional[ScoreRule] = None):
    """Scores of windows through a weight dict with the gateway's numpy network and a score
    rule (default: the uncalibrated whole-window mean)."""
    rule = rule or ScoreRule(score_section())
    return rule.score(windows, Network(weights).reconstruct(windows))[0]


# ---------------------------------------------------------------------------------------------
# the training rows through the gateway's detector


def window_means(series: np.ndarray, window: int) -> np.ndarray:
    """Per-channel mean of the window ending at each row [T, C] (NaN before a full window and
    where a window holds a NaN row: a gap, or a rate channel's first row)."""
    x = np.asarray(series, np.float64)
    bad = ~np.isfinite(x)
    zero = np.zeros((1, x.shape[1]))
    total = np.cumsum(np.vstack([zero, np.where(bad, 0.0, x)]), axis=0)
    holes = np.cumsum(np.vstack([zero, bad.astype(np.float64)]), axis=0)
    out = np.full(x.shape, np.nan)
    sums = total[window:] - total[:-window]
    out[window - 1:] = np.where(holes[window:] - holes[:-window] > 0, np.nan, sums / window)
    return out


def fit_drift(model: TrainedModel, window: int, action: str = DRIFT_ACTION) -> dict:
    """The drift section: each channel's envelope is the range of the fit span's window levels,
    the levels the network was fitted on; its speed reference is the whole training span's.

    The calibration span (the end of the history, a fifth by default) is held back from the
    network. A slow channel can end the history above or below anything the fit span held (a
    rig still warming up), and there the network reconstructs a level it never learned, short of
    it near the top of its range: the error reads as a held offset in every later window at that
    level (issue 11's notes: one SKAB accelerometer alone, 22 alerts after training). Bounded by
    the fit span's levels, such a channel is re-centred onto what the network learned, on the
    calibration span as at the gateway. How fast a level may move is a fact of the process, not
    of the network, so every training window shows it."""
    return envelope(model.series[:model.spans.calibration[1]], window, action,
                    fit_rows=model.spans.fit[1])


def window_levels(series: np.ndarray, window: int) -> np.ndarray:
    """runtime.drift.window_level of the window ending at each row [T, C] (NaN before a full
    window and where a window holds a NaN row), in chunks so a long history stays small."""
    x = np.asarray(series, np.float64)
    out = np.full(x.shape, np.nan)
    if len(x) < window:
        return out
    views = np.lib.stride_tricks.sliding_window_view(x, window, axis=0)  # [T-L+1, C, L]
    for a in range(0, len(views), LEVEL_CHUNK):
        chunk = views[a:a + LEVEL_CHUNK].swapaxes(1, 2)  # [n, L, C]
        out[window - 1 + a: window - 1 + a + len(chunk)] = window_level(chunk)
    return out


def envelope(series: np.ndarray, window: int, action: str = DRIFT_ACTION,
             alert_steps: bool = ALERT_STEPS, fit_rows: Optional[int] = None) -> dict:
    """The manifest's drift section from scaled rows [T, C]: lowest / highest window level of
    the windows inside the first `fit_rows` rows (all rows when None), and the largest change of
    the window level over one window anywhere, per channel."""
    m = window_levels(series, window)
    inside = m[:fit_rows]
    inside = inside[np.isfinite(inside).all(axis=1)]
    step = np.abs(m[window:] - m[:-window])
    step = step[np.isfinite(step).all(axis=1)]
    v_max = step.max(axis=0) if len(step) else np.zeros(m.shape[1])
    return drift_section(inside.min(axis=0), inside.max(axis=0), v_max, action, alert_steps)


def choose_regimes(fit_means: np.ndarray, cal_means: np.ndarray, seed: int = 0):
    """(centres [G, C], report) by the rule in the module docstring (scikit-learn's KMeans and
    silhouette_score)."""
    from sklearn.cluster import KMeans
    from sklearn.metrics import silhouette_score

    x = fit_means[np.isfinite(fit_means).all(axis=1)]
    best = (x.mean(axis=0, keepdims=True), {"regimes": 1, "silhouette": None})
    for k in range(2, K_MAX + 1):
        if len(x) < k * MIN_REGIME_WINDOWS:
            break
        km = KMeans(n_clusters=k, n_init=10, random_state=seed).fit(x)
        counts = np.bincount(km.predict(cal_means), minlength=k)
        sil = float(silhouette_score(x, km.labels_, sample_size=min(len(x), 2000),
                                     random_state=seed))
        if counts.min() >= MIN_REGIME_WINDOWS and sil >= SILHOUETTE_MIN:
            best = (km.cluster_centers_, {"regimes": k, "silhouette": sil,
                                          "calibration_windows": counts.tolist()})
    return best


def detector_bundle(model: TrainedModel, window: int, hop: int, score: dict, threshold: dict,
                    alerting: dict, drift: Optional[dict]) -> Bundle:
    """An in-memory bundle of the model's data contract and these detector settings, for the
    gateway's Detector on the workstation (no network inside: the caller brings a scorer)."""
    manifest = build_manifest(
        name="workstation", time_column=model.time_col,
        channels=list(zip(model.channels, model.units)), period_s=model.period_s,
        max_gap_periods=model.max_fill_periods, scaler=model.scaler.to_json(), window=window,
        hop=hop, network={"encoder": [1], "latent": 1, "generator": [1]}, score=score,
        threshold=threshold, alerting=alerting,
        board={"name": "workstation", "budget": {}, "estimate": {}},
        tool_version="workstation", drift=drift, **model.written)
    return Bundle.in_memory(manifest, {})


def replay_training(model: TrainedModel, scorer, window: int, hop: int,
                    drift: Optional[dict], score: dict):
    """Every hop of the training rows through the gateway's Detector: (rows [H], residuals
    [H, C], window means [H, C] as the network saw them, scores [H], the means of the window's
    pieces [H, P, C] (score.piece_means))."""
    bundle = detector_bundle(model, window, hop, score, {"kind": "static", "level": 1e300},
                             default_alerting(window, hop), drift)
    det = Detector(bundle, scorer)
    rows, res, means, scores, pieces = [], [], [], [], []
    raw = model.raw[:model.spans.calibration[1]]
    for k in np.flatnonzero(np.isfinite(raw).all(axis=1)):
        hops = det.counters["hops"]
        det.feed(float(k) * model.period_s, raw[k])
        if det.counters["hops"] > hops:
            h = det.last_hop
            rows.append(k)
            res.append(h["residuals"])
            means.append(h["means"])
            scores.append(h["score"])
            pieces.append(piece_means(h["window"][None], det.rule.steps)[0])
    return (np.asarray(rows), np.asarray(res), np.asarray(means), np.asarray(scores),
            np.asarray(pieces))


# ---------------------------------------------------------------------------------------------
# the stage


@dataclass
class Calibration:
    score: dict             # the manifest's score section
    drift: dict             # the manifest's drift section
    policy: dict            # the manifest's threshold section
    alerting: dict          # the manifest's alerting section
    false_alarms: dict      # the budget and what it implies
    scores: np.ndarray      # the calibration span's scores under the final rule
    report: dict


def calibrate(model: TrainedModel, scorer, window: int, hop: int, kind: str = "pot",
              alarms_per_week: float = DEFAULT_ALARMS_PER_WEEK,
              alerting: Optional[dict] = None, seed: int = 0,
              drift_action: str = DRIFT_ACTION) -> Calibration:
    """Fit drift, regimes, score scale and threshold for `scorer` (a network backend)."""
    drift = fit_drift(model, window, drift_action)
    cal_start, cal_end = model.spans.calibration
    means = window_means(model.series[:cal_end].astype(np.float64), window)
    fit_rows = np.arange(window - 1, cal_start)
    centres, regimes = choose_regimes(means[fit_rows],
                                      means[cal_start:cal_end][np.isfinite(
                                          means[cal_start:cal_end]).all(axis=1)], seed)
    steps = max(1, window // SCORED_FRACTION)
    rows, res, hop_means, _, hop_pieces = replay_training(
        model, scorer, window, hop, drift,
        score_section(combine=COMBINE, steps=steps, statistic=STATISTIC))
    cal = rows >= cal_start
    if cal.sum() < 2:
        raise ValueError("the calibration span holds fewer than 2 windows; train with a longer "
                         "history or a larger --calibration fraction")
    cal_scale = regime_scale(res[cal], hop_means[cal], centres)
    fit_scale = regime_scale(res[~cal], hop_means[~cal], centres) if (~cal).sum() >= 2 else None
    scale = normal_scale(cal_scale, fit_scale)
    score = score_section(centres, scale, COMBINE, steps, STATISTIC)
    rule = ScoreRule(score)
    scores = rule.apply(res[cal], hop_means[cal])[0]
    risk = risk_per_hop(alarms_per_week, model.period_s, hop)
    pieces = tail_scores(scores, res[~cal], hop_means[~cal], centres, fit_scale, steps)
    changes = rule.state_changes(hop_means, hop_pieces)
    policy, cusum, held = detector_policy(kind, pieces, risk, model.raw[:cal_end], hop,
                                          [changes[cal], changes[~cal]][:len(pieces)])
    false_alarms = budget_record(alarms_per_week, risk, policy, model.period_s * hop)
    tails = cal_scale / regime_scale(res[cal], hop_means[cal], centres, match_tails=False)
    regimes = {**regimes, "tail_factor": dict(zip(model.channels, tails.max(axis=0).tolist())),
               "fit_factor": dict(zip(model.channels, (scale / cal_scale).max(axis=0).tolist()))}
    report = {"regimes": regimes, "threshold_kind": policy["kind"], "cusum": cusum,
              "held": {**held, "names": list(model.channels)},
              "calibration_scores": int(cal.sum()), "false_alarms": false_alarms}
    return Calibration(score, drift, policy, {**default_alerting(window, hop), **(alerting or {})},
                       false_alarms, scores, report)


def calibrated_bundle(model: TrainedModel, scorer, window: int, hop: int, kind: str = "pot",
                      alarms_per_week: float = DEFAULT_ALARMS_PER_WEEK,
                      alerting: Optional[dict] = None,
                      drift_action: str = DRIFT_ACTION) -> Bundle:
    """The detector `scorer` would be on the gateway, calibrated here, as an in-memory bundle
    (what `ganlet evaluate` runs the teacher through)."""
    cal = calibrate(model, scorer, window, hop, kind, alarms_per_week, alerting,
                    drift_action=drift_action)
    return detector_bundle(model, window, hop, cal.score, cal.policy, cal.alerting, cal.drift)


def tail_scores(cal_scores: np.ndarray, fit_res: np.ndarray, fit_means: np.ndarray,
                centres: np.ndarray, fit_scale: Optional[np.ndarray], steps: int) -> list:
    """The scores the threshold's tail is fitted on: the calibration span's, and the fit span's
    each relative to the fit span's own per-regime scale (`fit_scale`, regime_scale's; None
    with fewer than 2 fit-span hops). The normal level (the
    score's scale) stays the calibration span's, which the network never trained on; the shape of
    the tail gets every training window, since a short calibration span alone holds too few,
    strongly correlated scores to show it (issue 11's notes: on 400-row SKAB files the
    calibration span alone put the level barely above the median). Two pieces, each in hop
    order (the CUSUM's excursions are counted within each)."""
    if fit_scale is None:
        return [cal_scores]
    fit_rule = ScoreRule(score_section(centres, fit_scale, COMBINE, steps, STATISTIC))
    return [cal_scores, fit_rule.apply(fit_res, fit_means)[0]]


def normal_scale(cal_scale: np.ndarray, fit_scale: Optional[np.ndarray]) -> np.ndarray:
    """Per regime and channel, the RMS error that reads as 1: the calibration span's
    (`cal_scale`, regime_scale's), never below the fit span's (`fit_scale`, the same statistic;
    None without fit-span hops).

    The calibration span is the end of the training history (a fifth by default). It can hold
    a slow channel at one level, near the value the network puts out for that channel whatever
    its level (a network that learned a slowly wandering channel as a constant): the channel's
    error there is tiny, and every later move of its level reads as many normal errors. The fit
    span, longer (four times by default), shows how far such a channel's error goes in normal
    running. For a channel the network follows, its error on the fit span, which it trained on,
    is the smaller, and the calibration span's stands (issue 11's notes: SKAB valve1 file 11's
    thermocouple, put out at 0.81 to 0.85 scaled units whatever its level)."""
    return cal_scale if fit_scale is None else np.maximum(cal_scale, fit_scale)


def regime_scale(res: np.ndarray, means: np.ndarray, centres: np.ndarray,
                 match_tails: bool = True) -> np.ndarray:
    """Per regime and channel: the RMS error of its calibration hops that reads as 1 (floored):
    tail_matched_scale's, or with match_tails False the median (what the report compares)."""
    u = np.sqrt(np.maximum(res.astype(np.float64), 0.0))
    label = ScoreRule(score_section(centres, np.ones_like(centres))).regime(means)
    floor = np.maximum(np.median(u, axis=0) * FLOOR_FRACTION, 1e-12)

    def scale(v: np.ndarray) -> np.ndarray:
        if match_tails:
            return tail_matched_scale(v, floor)
        return np.maximum(np.median(v, axis=0), floor)

    return np.array([scale(u[label == g]) if (label == g).any() else scale(u)
                     for g in range(len(centres))])


def tail_matched_scale(u: np.ndarray, floor: np.ndarray) -> np.ndarray:
    """Per channel, from normal RMS errors u [N, C]: the median error, or for a channel whose
    normal error has a heavier tail than the channels' typical one (its top decile further above
    its median), the error that puts its top decile where the typical channel's is.

    A channel with occasional large normal errors (vibration on a start-up, a bearing
    temperature cooling after a stop) would otherwise carry the score's normal tail by itself:
    the threshold and the CUSUM's limit are then set above those events, and a fault that stands
    out on other channels stays under them (demo seed 5 with median scales: level 16.8, its
    cavitations scored 10 to 15). A channel lighter-tailed than typical keeps its median, so
    no channel counts more than "times its typical normal error". With one channel, or channels
    alike, this is the median."""
    median = np.maximum(np.median(u, axis=0), floor)
    tail = np.quantile(u, TAIL_QUANTILE, axis=0)
    typical = float(np.median(tail / median))
    if not typical > 0:  # most channels reconstructed exactly at their top decile
        return median
    return np.maximum(median, tail / typical)


def agreement_report(model: TrainedModel, score: dict, fp32: dict, device: dict) -> dict:
    """Teacher vs fp32 student vs int8 device on the calibration span's windows, under the
    bundle's own score rule."""
    from ganlet.compile.train import teacher_reconstruct

    x = model.windows_of(model.spans.calibration)
    rule = ScoreRule(score)
    teacher = rule.score(x, teacher_reconstruct(model.teacher, x))[0]
    student = network_scores(fp32, x, rule)
    int8 = network_scores(device, x, rule)
    return {"teacher_vs_student": agreement(teacher, student),
            "student_vs_int8": agreement(student, int8)}
