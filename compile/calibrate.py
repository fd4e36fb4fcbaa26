"""Calibrate: what the device will score on the held-back calibration span, the threshold
policy fitted to those scores, and how closely the student and its int8 copy follow the teacher.

The device's scores are computed with the gateway's own code (runtime.lstm.Network on the
dequantised int8 weights, runtime.score.ScoreRule), so the policy is calibrated on the numbers
the gateway will produce. `policy_for` is also the rule `ganlet evaluate` gives every method.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Optional

import numpy as np
from scipy.stats import spearmanr

from ganlet.compile.train import TrainedModel, score_windows
from ganlet.runtime.alerts import default_alerting
from ganlet.runtime.lstm import Network
from ganlet.runtime.score import ScoreRule, score_section
from ganlet.runtime.thresholds import KINDS, calibrate_policy

SECONDS_PER_WEEK = 7 * 86400.0
# The engineer's false-alarm budget on normal data when none is given: one alarm per week per
# detector (common practice for an advisory monitor one person reviews; state your own with
# --false-alarms-per-week).
DEFAULT_ALARMS_PER_WEEK = 1.0


def risk_per_hop(alarms_per_week: float, period_s: float, hop: int) -> float:
    """The POT risk q for a budget: an alarm needs at least one hop over the level, so at most
    q x hops-per-week alarms a week are expected on normal data (runs of hops only lower it)."""
    if not alarms_per_week > 0:
        raise ValueError(f"--false-alarms-per-week must be > 0, got {alarms_per_week}")
    return float(alarms_per_week) * period_s * hop / SECONDS_PER_WEEK


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


def network_scores(weights: dict, windows: np.ndarray) -> np.ndarray:
    """Scores of windows through a weight dict with the gateway's numpy network and rule."""
    _, res = Network(weights).forward(windows)
    return ScoreRule(score_section()).apply(res)[0]


@dataclass
class Calibration:
    policy: dict            # the manifest's threshold section
    alerting: dict          # the manifest's alerting section
    device_scores: np.ndarray
    report: dict            # agreement figures, threshold kind, number of scores


def calibrate(model: TrainedModel, fp32_weights: dict, device_weights: dict, kind: str,
              window: int, hop: int, alerting: Optional[dict] = None) -> Calibration:
    """Score the calibration span with teacher, fp32 student and device; fit the policy on the
    device's scores. alerting: overrides of runtime.alerts.default_alerting."""
    x = model.windows_of(model.spans.calibration)
    if len(x) < 2:
        raise ValueError("the calibration span holds fewer than 2 windows; train with a longer "
                         "history or a larger --calibration fraction")
    teacher, _ = score_windows(model.teacher, x)
    student = network_scores(fp32_weights, x)
    device = network_scores(device_weights, x)
    policy = policy_for(kind, device)
    report = {"teacher_vs_student": agreement(teacher, student),
              "student_vs_int8": agreement(student, device),
              "threshold_kind": policy["kind"], "calibration_scores": int(len(device))}
    settings = {**default_alerting(window, hop), **(alerting or {})}
    return Calibration(policy, settings, device, report)
