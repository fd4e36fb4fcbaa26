"""Detection quality against known incidents, beside simple baselines under the same rule.

Scores per grid point:
  teacher     a model directory: the torch teacher, the window ending at each point
  bundle      a bundle: the int8 student through the gateway path (`run.py stream
              --scores-out`), each hop's score and alert held until the next hop
  baselines   IsolationForest, GaussianMixture (negative log-likelihood), OneClassSVM on each
              point's C channel levels, robust-scaled on the fit span, and a rolling z-score
              (mean over channels of z^2 against the trailing ROLLING_Z_WINDOW points). They
              see the data as delivered: levels, even for channels the detector watches by
              rate (an off-the-shelf method is run that way; DEVELOPERS.md has both figures)
One threshold rule for every method: the policy kind the bundle was calibrated with (for a
model directory, the kind asked for, with the same short-span fallback as compile), calibrated
on the method's own calibration-span scores, then the same alert machine. The bundle's alerts
are the gateway's own.

Metrics on the evaluated points: point-wise precision, recall, F1; false-alarm rate (FAR,
share of normal points flagged) and missed-alarm rate (MAR, share of anomalous points missed);
event recall (incidents hit by at least one alert point); mean detection delay (incident start
to the first alert point inside it); false alarms per day (alert events overlapping no
incident, per day of evaluated time).
"""

from __future__ import annotations

import json
import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Optional

import numpy as np
import pandas as pd

from ganlet.compile import report as rep
from ganlet.compile.calibrate import policy_for
from ganlet.compile.data import (
    Frame,
    IntakeError,
    IntakeOptions,
    RobustScaler,
    grid_index,
    load_frame,
    parse_times,
    segments_in,
)
from ganlet.compile.gateway import UnusableInput, gateway_csv, read_scores, run_bundle
from ganlet.compile.verify import alert_events, clean_json, replay_alerts
from ganlet.runtime.alerts import default_alerting

ROLLING_Z_WINDOW = 64          # trailing points of the rolling z-score baseline
BASELINES = ("IsolationForest", "GaussianMixture", "OneClassSVM", "rolling z-score")


# ---------------------------------------------------------------------------------------------
# incidents and metrics


def read_incidents(path) -> pd.DataFrame:
    """CSV start,end[,kind]; both ends inclusive."""
    path = Path(path)
    if not path.is_file():
        raise IntakeError(f"{path}: no such incidents file")
    df = pd.read_csv(path)
    if "start" not in df.columns or "end" not in df.columns:
        raise IntakeError(f"{path}: incidents need columns start,end[,kind]; found "
                          f"{', '.join(map(str, df.columns))}")
    start, end = parse_times(df["start"]), parse_times(df["end"])
    if start.isna().any() or end.isna().any():
        raise IntakeError(f"{path}: an incident start or end cannot be parsed as a time")
    if (end < start).any():
        raise IntakeError(f"{path}: an incident ends before it starts")
    kind = df["kind"].astype(str) if "kind" in df.columns else pd.Series(["incident"] * len(df))
    return pd.DataFrame({"start": start.to_numpy(), "end": end.to_numpy(),
                         "kind": kind.to_numpy()})


def incident_labels(times: pd.DatetimeIndex, incidents: pd.DataFrame) -> np.ndarray:
    t = np.asarray(times.values)
    y = np.zeros(len(t), bool)
    for s, e in zip(incidents["start"].to_numpy(), incidents["end"].to_numpy()):
        y |= (t >= s) & (t <= e)
    return y


def point_metrics(y_true, y_pred) -> dict:
    """Precision, recall, F1 of the anomalous class; FAR = FP / (FP + TN); MAR = FN / (FN + TP).
    An empty denominator gives 0 (no positives predicted: precision 0, as sklearn's
    zero_division=0)."""
    y, p = np.asarray(y_true, bool), np.asarray(y_pred, bool)
    tp = int((y & p).sum())
    fp = int((~y & p).sum())
    fn = int((y & ~p).sum())
    tn = int((~y & ~p).sum())
    precision = tp / (tp + fp) if tp + fp else 0.0
    recall = tp / (tp + fn) if tp + fn else 0.0
    f1 = 2 * precision * recall / (precision + recall) if precision + recall else 0.0
    return {"precision": precision, "recall": recall, "f1": f1,
            "far": fp / (fp + tn) if fp + tn else 0.0, "mar": fn / (fn + tp) if fn + tp else 0.0,
            "tp": tp, "fp": fp, "fn": fn, "tn": tn}


def event_metrics(times: np.ndarray, y: np.ndarray, alert: np.ndarray, period_s: float) -> dict:
    """Event recall, mean detection delay and false alarms per day on the evaluated points."""
    incidents = alert_events(y)
    alerts = alert_events(alert)
    hit, delays = 0, []
    for b, e in incidents:
        inside = np.flatnonzero(alert[b:e])
        if len(inside):
            hit += 1
            delays.append(float((times[b + inside[0]] - times[b]) / np.timedelta64(1, "s")))
    false = sum(1 for b, e in alerts if not y[b:e].any())
    days = len(times) * period_s / 86400.0
    return {"incidents": len(incidents), "detected": hit,
            "event_recall": hit / len(incidents) if incidents else float("nan"),
            "mean_delay_s": float(np.mean(delays)) if delays else float("nan"),
            "alert_events": len(alerts), "false_alarm_events": false,
            "false_alarms_per_day": false / days if days > 0 else float("nan")}


# ---------------------------------------------------------------------------------------------
# the threshold rule


@dataclass
class Rule:
    """The one threshold rule: a policy kind calibrated per method, and the alert machine."""

    kind: str
    alerting: dict

    def policy(self, calibration_scores: np.ndarray) -> dict:
        return policy_for(self.kind, calibration_scores)

    def apply(self, calibration_scores: np.ndarray, scores: np.ndarray):
        policy = self.policy(calibration_scores)
        levels, alert = replay_alerts(scores, policy, self.alerting)
        return policy, levels, alert


# ---------------------------------------------------------------------------------------------
# baselines


def rolling_z(series: np.ndarray, width: int = ROLLING_Z_WINDOW) -> np.ndarray:
    """Mean over channels of z^2, z against the trailing `width` points (current excluded)."""
    df = pd.DataFrame(series.astype(np.float64))
    past = df.shift(1).rolling(width, min_periods=width)
    z = (df - past.mean()) / past.std().clip(lower=1e-6)
    return (z ** 2).mean(axis=1, skipna=False).to_numpy()


def baseline_scores(fit_points: np.ndarray, points: np.ndarray, seed: int = 0) -> dict:
    """Anomaly scores (larger = more anomalous) of each scaled point for the three
    scikit-learn baselines fitted on the fit span's points."""
    from sklearn.ensemble import IsolationForest
    from sklearn.mixture import GaussianMixture
    from sklearn.svm import OneClassSVM

    ok = np.isfinite(points).all(axis=1)
    fit = fit_points[np.isfinite(fit_points).all(axis=1)].astype(np.float64)
    out = {}
    models = {
        "IsolationForest": IsolationForest(n_estimators=200, random_state=seed).fit(fit),
        "GaussianMixture": GaussianMixture(n_components=min(4, max(1, len(fit) // 50)),
                                           covariance_type="full", reg_covar=1e-3,
                                           random_state=seed).fit(fit),
        "OneClassSVM": OneClassSVM(nu=0.05, gamma="scale").fit(fit),
    }
    for name, model in models.items():
        s = np.full(len(points), np.nan)
        x = points[ok].astype(np.float64)
        # sklearn: larger score_samples = more normal (for GaussianMixture it is the
        # log-likelihood, so the negation is the negative log-likelihood)
        s[ok] = -model.score_samples(x)
        out[name] = s
    return out


# ---------------------------------------------------------------------------------------------
# evaluation


@dataclass
class Method:
    name: str
    scores: np.ndarray              # per grid point
    thresholds: np.ndarray
    alert: np.ndarray
    policy_kind: str
    metrics: dict = field(default_factory=dict)


@dataclass
class EvalResult:
    source: str
    data: str
    times: pd.DatetimeIndex
    labels: np.ndarray
    evaluated: np.ndarray           # grid points the metrics count
    methods: dict
    incidents: pd.DataFrame
    rule: Rule
    features: str
    notes: list = field(default_factory=list)

    def table_rows(self):
        rows = []
        for m in self.methods.values():
            k = m.metrics
            rows.append([m.name, k["precision"], k["recall"], k["f1"], k["far"], k["mar"],
                         k["event_recall"], k["mean_delay_s"], k["false_alarms_per_day"],
                         m.policy_kind])
        return rows

    HEADERS = ["method", "precision", "recall", "F1", "FAR", "MAR", "event recall",
               "mean delay (s)", "false alarms/day", "threshold"]

    def summary(self) -> str:
        lines = [f"detection on {self.data} ({int(self.evaluated.sum())} points evaluated, "
                 f"{int(self.labels[self.evaluated].sum())} inside {len(self.incidents)} "
                 f"incidents); source {self.source}",
                 rep.text_table(self.HEADERS, self.table_rows()),
                 f"baseline features: {self.features}",
                 f"one threshold rule for all: {self.rule.kind} policy calibrated on each "
                 f"method's calibration-span scores, alert machine {self.rule.alerting}"]
        lines += [f"note: {n}" for n in self.notes]
        return "\n".join(lines)

    def to_json(self) -> dict:
        return clean_json({
            "source": self.source, "data": self.data,
            "evaluated_points": int(self.evaluated.sum()),
            "anomalous_points": int(self.labels[self.evaluated].sum()),
            "incidents": len(self.incidents), "features": self.features,
            "rule": {"kind": self.rule.kind, "alerting": self.rule.alerting},
            "methods": {m.name: dict(m.metrics, threshold=m.policy_kind)
                        for m in self.methods.values()},
            "notes": self.notes})


def hold(rows: np.ndarray, values: np.ndarray, n: int) -> np.ndarray:
    """Per-hop values placed on the grid and held until the next hop (NaN before the first)."""
    out = pd.Series(np.nan, index=np.arange(n), dtype=float)
    out.iloc[rows] = np.asarray(values, float)
    return out.ffill().to_numpy()


def level_views(model, frame: Frame):
    """(training rows, DATA rows) as every channel's level, robust-scaled on the fit span: the
    baselines' input."""
    if model.raw is None:   # a model directory from before raw rows were kept: all levels
        return model.series, model.scaler.transform(frame.values)
    f0, f1 = model.spans.fit
    scaler = RobustScaler.fit(model.raw[f0:f1], model.channels)
    return scaler.transform(model.raw), scaler.transform(frame.values)


def source_kind(path: Path) -> str:
    path = Path(path)
    if (path / "manifest.json").is_file():
        return "bundle"
    if (path / "model.json").is_file():
        return "model"
    raise IntakeError(f"{path} is neither a bundle (manifest.json) nor a model directory "
                      "(model.json)")


def _span_segments(segments, span) -> list:
    b0, e0 = span
    return [(max(b, b0), min(e, e0)) for b, e in segments if min(e, e0) > max(b, b0)]


def evaluate(source: Path, data: Path, incidents, eval_from=None,
             eval_mask: Optional[np.ndarray] = None, threshold: str = "pot",
             baselines: bool = True, teacher: bool = True,
             model_dir: Optional[Path] = None) -> EvalResult:
    """source: a model directory or a bundle (then model_dir, its teacher's folder, adds the
    teacher and the baselines). eval_from: first evaluated row (int) or time (str); eval_mask:
    explicit grid points to evaluate (overrides eval_from)."""
    from ganlet.compile.train import load_model, score_series

    kind = source_kind(source)
    notes = []
    bundle = None
    if kind == "bundle":
        from ganlet.runtime.manifest import BundleError, load_bundle

        try:
            bundle = load_bundle(source)
        except BundleError as exc:
            raise UnusableInput(f"bundle refused: {exc}") from None
        model = load_model(model_dir) if model_dir is not None else None
        if model is None:
            notes.append("no --model DIR given: the teacher and the baselines (which need its "
                         "training split) are skipped")
        rule = Rule(bundle.threshold_policy["kind"], dict(bundle.alerting))
        opts = IntakeOptions(time_col=bundle.time_column, channels=bundle.channels,
                             period_s=bundle.period_s, max_fill_periods=bundle.max_gap_periods,
                             tz=bundle.manifest.get("time_zone"))
    else:
        model = load_model(source)
        rule = Rule(threshold, default_alerting(model.teacher.config.window, 1))
        opts = IntakeOptions(time_col=model.time_col, channels=model.channels,
                             period_s=model.period_s, max_fill_periods=model.max_fill_periods,
                             tz=model.time_zone)
    frame: Frame = load_frame(data, opts)
    watched = bundle.features if bundle is not None else model.scaler.features
    by_rate = [c for c, f in zip(frame.channels, watched) if f == "rate"]
    if by_rate:
        notes.append(f"the detector watches {', '.join(by_rate)} by rate (change per period); "
                     "the baselines see every channel's level")
    inc = incidents if isinstance(incidents, pd.DataFrame) else read_incidents(incidents)
    y = incident_labels(frame.times, inc)
    n = len(frame.times)
    if eval_mask is not None:
        evaluated = np.asarray(eval_mask, bool).copy()
    elif eval_from is None:
        evaluated = np.ones(n, bool)
    elif isinstance(eval_from, (int, np.integer)):
        evaluated = np.arange(n) >= int(eval_from)
    else:
        stamp = parse_times(pd.Series([str(eval_from)])).iloc[0]
        if pd.isna(stamp):
            raise IntakeError(f"--from {eval_from!r}: give a row number or a time")
        evaluated = frame.times.values >= stamp.to_datetime64()
    evaluated &= ~np.isnan(frame.values).any(axis=1)

    methods = {}
    if bundle is not None:
        with tempfile.TemporaryDirectory(prefix="ganlet-evaluate-") as tmp:
            feed = gateway_csv(Path(data), bundle.time_column, bundle.channels, Path(tmp))
            dev = read_scores(run_bundle(bundle.dir, feed, Path(tmp) / "gateway").scores)
        rows = grid_index(frame, dev["time"].to_numpy())
        keep = np.ones(len(rows), bool)
        alert = hold(rows, dev["alert"].to_numpy()[keep].astype(float), n)
        methods["bundle"] = Method("bundle (int8, gateway path)",
                                   hold(rows, dev["score"].to_numpy()[keep], n),
                                   hold(rows, dev["threshold"].to_numpy()[keep], n),
                                   np.nan_to_num(alert) > 0.5, rule.kind)

    if model is not None:
        cal_segments = _span_segments(model.segments, model.spans.calibration)
        window = model.teacher.config.window
        series = model.scaler.transform(frame.values)
        if teacher:
            cal_scores, _ = score_series(model.teacher, model.series, cal_segments, window)
            scores, _ = score_series(model.teacher, series, segments_in(series), window)
            pol, levels, alert = rule.apply(cal_scores[np.isfinite(cal_scores)], scores)
            methods["teacher"] = Method("teacher", scores, levels, alert, pol["kind"])
        if baselines:
            train_levels, data_levels = level_views(model, frame)
            (f0, f1), (c0, c1) = model.spans.fit, model.spans.calibration
            fit = train_levels[f0:f1]
            base = baseline_scores(fit[np.isfinite(fit).all(axis=1)],
                                   np.vstack([train_levels[c0:c1], data_levels]))
            base_cal = {k: v[: c1 - c0] for k, v in base.items()}
            base_all = {k: v[c1 - c0:] for k, v in base.items()}
            base_cal["rolling z-score"] = rolling_z(train_levels[:c1])[c0:c1]
            base_all["rolling z-score"] = rolling_z(data_levels)
            for name in BASELINES:
                pol, levels, alert = rule.apply(base_cal[name], base_all[name])
                methods[name] = Method(name, base_all[name], levels, alert, pol["kind"])
    if not methods:
        raise UnusableInput("nothing to evaluate")

    t = frame.times.values[evaluated]
    for m in methods.values():
        m.metrics = point_metrics(y[evaluated], m.alert[evaluated])
        m.metrics.update(event_metrics(t, y[evaluated], m.alert[evaluated], frame.period_s))
    return EvalResult(source=str(source), data=str(data), times=frame.times, labels=y,
                      evaluated=evaluated, methods=methods, incidents=inc, rule=rule,
                      features=f"each point's {len(frame.channels)} channel levels, "
                               "robust-scaled on the fit span (the data as delivered, whatever "
                               "the detector watches); rolling z-score over the trailing "
                               f"{ROLLING_Z_WINDOW} points",
                      notes=notes)


# ---------------------------------------------------------------------------------------------
# report


def plot_traces(result: EvalResult) -> bytes:
    plt = rep.pyplot()
    names = list(result.methods)
    fig, axes = plt.subplots(len(names), 1, figsize=(12, 1.7 * len(names) + 0.8), sharex=True,
                             constrained_layout=True, squeeze=False)
    t = result.times
    for k, key in enumerate(names):
        m = result.methods[key]
        ax = axes[k, 0]
        rep.shade_runs(ax, t, result.labels, "tab:orange", 0.25, "incident")
        rep.shade_runs(ax, t, m.alert & result.evaluated, "tab:red", 0.25, "alert open")
        ax.plot(t, m.scores, lw=0.6, color=rep.colour(key if key != "bundle" else "bundle", k),
                label="score")
        ax.plot(t, m.thresholds, lw=0.8, color="tab:red", ls="--", label="threshold")
        rep.positive_log_axis(ax, [m.scores])
        ax.set_ylabel(m.name.split(" (")[0], fontsize=9)
        f1 = m.metrics.get("f1", float("nan"))
        ax.set_title(f"{m.name}: F1 {f1:.3f}, FAR {m.metrics.get('far', 0):.3f}",
                     fontsize=9, loc="left")
        if k == 0:
            ax.legend(loc="upper right", fontsize=8, ncol=4)
    fig.suptitle("scores with incidents shaded (orange) and open alerts (red)")
    return rep.figure_png(fig)


def write_html(result: EvalResult, path: Path) -> Path:
    sections = [
        ("Summary", rep.paragraph(
            f"{int(result.evaluated.sum())} points evaluated, "
            f"{int(result.labels[result.evaluated].sum())} inside {len(result.incidents)} "
            f"incidents. Source: {result.source}.")),
        ("Methods side by side", rep.html_table(result.HEADERS, result.table_rows())
         + rep.paragraph(f"Baseline features: {result.features}. One threshold rule for all "
                         f"methods: the {result.rule.kind} policy calibrated on each method's "
                         f"own calibration-span scores, then the alert machine "
                         f"{result.rule.alerting}.", "note")),
        ("Incidents", rep.html_table(["start", "end", "kind"],
                                     result.incidents.astype(str).values.tolist())),
    ]
    if result.notes:
        sections.append(("Notes", "".join(rep.paragraph(n) for n in result.notes)))
    sections.append(("Score traces", rep.html_image(plot_traces(result), "score traces")))
    Path(path).write_text(rep.html_page("ganlet detection report", sections))
    return Path(path)


def write_json(result: EvalResult, path: Path) -> Path:
    Path(path).write_text(json.dumps(result.to_json(), indent=2, allow_nan=False) + "\n")
    return Path(path)
