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
One rule for every method, the one the gateway ships: the bundle's threshold policy kind and
false-alarm budget (for a model directory, the kind and budget asked for), calibrated on the
method's own calibration-span scores, with the held-reading limits of the raw training rows
(compile/calibrate.py detector_policy), then the gateway's own Judge (threshold, CUSUM, held
readings and alert machine, runtime/detector.py) hop by hop. The bundle's alerts are the
gateway's own (`run.py stream`); the teacher runs through the gateway's Detector on the same
feed with its own calibration (drift envelope, regimes, score scale, threshold), as if it were
the device's network.

The evaluated points are those from --from on with some channel read: a point with a channel
blank is scored by the gateway without it (runtime/blanks.py), so it counts; the baselines
cannot score it and raise no alert there.

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
from typing import Optional, Sequence

import numpy as np
import pandas as pd

from ganlet.compile import report as rep
from ganlet.compile.calibrate import (
    DEFAULT_ALARMS_PER_WEEK,
    DRIFT_ACTION,
    calibrated_bundle,
    detector_policy,
    risk_per_hop,
)
from ganlet.compile.data import (
    Frame,
    IntakeError,
    IntakeOptions,
    RobustScaler,
    as_numbers,
    grid_index,
    label_word,
    load_frame,
    parse_times,
    read_table,
    runs,
    time_column_of,
)
from ganlet.compile.gateway import UnusableInput, gateway_csv, read_scores, run_bundle
from ganlet.compile.verify import alert_events, clean_json, replay_alerts, replay_feed
from ganlet.runtime.alerts import default_alerting
from ganlet.runtime.cusum import MIN_EXCURSIONS
from ganlet.runtime.drift import STEP_TEXT, action_summary
from ganlet.runtime.manifest import times_from_rows, trained_dialect

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


def incidents_in_file(path: Path, column: Optional[str], options: IntakeOptions) -> tuple:
    """(incidents, the column read) from the data file's own label column: each run of labelled
    rows, in time order, is one incident from its first row's time to its last's. A row is
    labelled when its cell is a number other than 0, or text other than the column's most
    common value (NORMAL, Normal ...: a labelled file is mostly normal); a blank is not.
    `column` None: the one label-like column the file holds (data.label_word)."""
    df = read_table(Path(path), options.sep, options.decimal)
    if column is None:
        found = [c for c in df.columns if label_word(c) is not None]
        if len(found) != 1:
            held = f"holds {', '.join(map(repr, found))}" if found else "holds no label column"
            raise IntakeError(f"{path} {held}: give the incidents with --incidents FILE, or "
                              "the column that marks them with --labels COLUMN")
        column = found[0]
    elif column not in df.columns:
        raise IntakeError(f"--labels {column!r}: no such column in {path}; columns are "
                          f"{', '.join(map(str, df.columns))}")
    df, time_col, _ = time_column_of(df, options, [], warn=False)
    times = parse_times(df[time_col], options.dialect())
    cells = df[column]
    numbers = as_numbers(cells, options.decimal)
    if numbers.notna().sum() >= 0.5 * cells.notna().sum():
        labelled, kinds = numbers.fillna(0).to_numpy() != 0, pd.Series(str(column), df.index)
    else:
        text = cells.astype(str).str.strip().where(cells.notna())
        labelled, kinds = (text.notna() & (text != text.mode().iloc[0])).to_numpy(), text
    order = np.argsort(times.to_numpy(), kind="stable")
    t, flagged, kinds = times.to_numpy()[order], labelled[order], kinds.to_numpy()[order]
    flagged &= ~pd.isna(t)
    spans = runs(flagged)
    return pd.DataFrame({"start": [t[a] for a, _ in spans], "end": [t[b - 1] for _, b in spans],
                         "kind": [str(kinds[a]) for a, _ in spans]}), str(column)


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
    counts = {"tp": int((y & p).sum()), "fp": int((~y & p).sum()),
              "fn": int((y & ~p).sum()), "tn": int((~y & ~p).sum())}
    return {**{k: float(v) for k, v in rates(**counts).items()}, **counts}


def rates(tp, fp, fn, tn) -> dict:
    """point_metrics' rates of confusion counts, scalars or arrays alike (an empty denominator
    gives 0)."""
    tp, fp, fn, tn = (np.asarray(v, np.float64) for v in (tp, fp, fn, tn))

    def ratio(a, b):
        return np.where(b > 0, a / np.where(b > 0, b, 1.0), 0.0)

    precision, recall = ratio(tp, tp + fp), ratio(tp, tp + fn)
    return {"precision": precision, "recall": recall,
            "f1": ratio(2 * precision * recall, precision + recall),
            "far": ratio(fp, fp + tn), "mar": ratio(fn, fn + tp)}


def error_sites(y_true, y_pred) -> dict:
    """Where the wrong rows of a point metric sit, in rows (they add up to FP and FN).

    False alarms: `lead`, rows of an alert before the first labelled row it reaches; `tail`,
    its other unlabelled rows (after a label, or between two it spans); `apart`, rows of an alert
    that reaches no label. Misses: `onset`, rows of a labelled run before its first alerted row;
    `unseen`, every row of a run no alert reaches; `dropped`, the other missed rows (the alert
    closed, or paused, inside the run). Lead and tail say the alerts and the labels disagree on
    where an incident starts and ends; apart and unseen are detections and misses outright."""
    y, p = np.asarray(y_true, bool), np.asarray(y_pred, bool)
    lead, tail, apart = _split_runs(p, y)
    onset, dropped, unseen = _split_runs(y, p)
    return {"lead": lead, "tail": tail, "apart": apart,
            "onset": onset, "unseen": unseen, "dropped": dropped}


def _split_runs(outer: np.ndarray, inner: np.ndarray) -> tuple:
    """The rows of `outer`'s runs where `inner` is False, as (before inner's first row in the
    run, after it, in runs inner never reaches)."""
    before = after = never = 0
    for a, b in runs(outer):
        hit = np.flatnonzero(inner[a:b])
        if not hit.size:
            never += b - a
            continue
        before += int(hit[0])
        after += int((~inner[a:b]).sum()) - int(hit[0])
    return before, after, never


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
    """The one threshold rule: a policy kind and false-alarm budget calibrated per method, and
    the alert machine; per-point methods (the baselines) count each point as a hop."""

    kind: str
    alerting: dict
    alarms_per_week: float = DEFAULT_ALARMS_PER_WEEK
    drift: str = DRIFT_ACTION

    def policy(self, calibration_scores: np.ndarray, period_s: float,
               history: np.ndarray) -> dict:
        """`history`: the raw normal rows the held-reading limits are fitted on."""
        return detector_policy(self.kind, [calibration_scores],
                               risk_per_hop(self.alarms_per_week, period_s, 1), history, 1)[0]

    def apply(self, calibration_scores: np.ndarray, scores: np.ndarray, period_s: float,
              history: np.ndarray, readings: np.ndarray):
        """`readings`: the raw row of each scored point (held readings are judged on them)."""
        policy = self.policy(calibration_scores, period_s, history)
        levels, alert = replay_alerts(scores, policy, self.alerting, readings)
        alert = from_opening(alert, int(self.alerting["min_hops"]))
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


GLOSSARY = (
    ("precision", "share of the points flagged (alert open) that lie inside an incident"),
    ("recall", "share of the points inside incidents that are flagged"),
    ("F1", "F1 score: the harmonic mean of precision and recall, 2PR / (P + R)"),
    ("FAR", "false-alarm rate: share of normal points flagged, FP / (FP + TN)"),
    ("MAR", "missed-alarm rate: share of incident points not flagged, FN / (FN + TP)"),
    ("event recall", "share of incidents with at least one flagged point"),
    ("mean delay", "mean time from an incident's start to its first flagged point, over the "
                   "incidents detected ('-' when none was)"),
    ("false alarms/day", "alert events that touch no incident, per day of evaluated time"),
    ("threshold", "the policy that sets each method's threshold: pot = peaks-over-threshold "
                  "(a generalised Pareto tail fitted to the calibration scores), rolling = "
                  "rolling median + k times the median absolute deviation (MAD), static = a "
                  "fixed quantile of the calibration scores"),
    ("TP, FP, FN, TN", "true positives, false positives, false negatives, true negatives "
                       "(points)"),
)
# Where the wrong points sit (error_sites): the header of each kind and what it counts. The first
# three add up to FP, the last three to FN.
SITES = (
    ("lead", "before", "false alarms: points of an alert before the first incident point it "
                       "reaches (the alert opened early, or the incident's label starts late)"),
    ("tail", "after", "false alarms: the other normal points of an alert that reaches an "
                      "incident (it stayed open after the incident's labelled end)"),
    ("apart", "apart", "false alarms: points of alerts that reach no incident"),
    ("onset", "onset", "misses: points of an incident before its first flagged point (the "
                       "detection delay)"),
    ("unseen", "unseen", "misses: every point of an incident no alert reaches"),
    ("dropped", "dropped", "misses: the other points of a detected incident that no alert "
                           "covers (the alert closed, or paused, inside it)"),
)
FALSE_ALARM_SITES = tuple(key for key, _, _ in SITES[:3])


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
    provenance: dict = field(default_factory=dict)   # what was tested (report.py parts)

    def table_rows(self):
        rows = []
        for m in self.methods.values():
            k = m.metrics
            rows.append([m.name, k["precision"], k["recall"], k["f1"], k["far"], k["mar"],
                         k["event_recall"], rep.duration(k["mean_delay_s"]),
                         k["false_alarms_per_day"], m.policy_kind])
        return rows

    def site_rows(self):
        """Per method: FP split by where it sits, then FN (points; error_sites)."""
        rows = []
        for m in self.methods.values():
            k = m.metrics
            rows.append([m.name] + [k["sites"][key] for key in FALSE_ALARM_SITES] + [k["fp"]]
                        + [k["sites"][key] for key, _, _ in SITES[3:]] + [k["fn"]])
        return rows

    SITE_HEADERS = (["method"] + [f"FP {head}" for _, head, _ in SITES[:3]] + ["FP"]
                    + [f"FN {head}" for _, head, _ in SITES[3:]] + ["FN"])

    HEADERS = ["method", "precision", "recall", "F1", "FAR", "MAR", "event recall",
               "mean delay", "false alarms/day", "threshold"]
    HTML_HEADERS = ["method", "precision", "recall", "F1 score", "false-alarm rate (FAR)",
                    "missed-alarm rate (MAR)", "event recall", "mean detection delay",
                    "false alarms per day", "threshold policy"]

    @property
    def step_s(self) -> dict:
        """One step of the alert machine in seconds: a grid point, or the bundle's hop."""
        period = (float((self.times[1] - self.times[0]).total_seconds())
                  if len(self.times) > 1 else float("nan"))
        out = {"point": period}
        hop = self.provenance.get("bundle", {}).get("hop")
        if hop:
            out["bundle hop"] = hop * period
        return out

    def span(self) -> dict:
        """Where evaluation starts and ends, and what was left out."""
        idx = np.flatnonzero(self.evaluated)
        if not len(idx):
            return {"points": 0}
        t = self.times
        return {"first": f"{t[idx[0]]:%Y-%m-%d %H:%M:%S} UTC", "first_row": int(idx[0]),
                "last": f"{t[idx[-1]]:%Y-%m-%d %H:%M:%S} UTC", "points": int(len(idx)),
                "before": int(idx[0]),
                "gaps": int(idx[-1] - idx[0] + 1 - len(idx))}

    def span_text(self) -> str:
        s = self.span()
        if not s["points"]:
            return "no point was evaluated"
        text = (f"Evaluation from {s['first']} (grid point {s['first_row']}) to {s['last']}: "
                f"{s['points']} points")
        if s["before"]:
            text += f"; the {s['before']} points before are not counted"
        if s["gaps"]:
            text += f"; {s['gaps']} points inside it with no reading at all are not counted"
        return text

    def rule_text(self) -> str:
        steps = ", ".join(f"{k} {v}" for k, v in self.rule.alerting.items())
        return (f"one threshold rule for all: the {self.rule.kind} policy calibrated on each "
                f"method's own calibration-span scores, then the alert machine ({steps})")

    def summary(self) -> str:
        lines = [f"detection on {self.data} ({int(self.evaluated.sum())} points evaluated, "
                 f"{int(self.labels[self.evaluated].sum())} inside {len(self.incidents)} "
                 f"incidents); source {self.source}",
                 self.span_text(),
                 rep.text_table(self.HEADERS, self.table_rows()),
                 "F1 = harmonic mean of precision and recall; FAR = false-alarm rate (share of "
                 "normal points flagged); MAR = missed-alarm rate (share of incident points "
                 "missed)",
                 "where the wrong points sit (false alarms FP: before / after an incident in "
                 "an alert that reaches it, or apart from every incident; misses FN: at an "
                 "incident's onset, in an incident no alert reaches, or dropped after its "
                 "alert closed):",
                 rep.text_table(self.SITE_HEADERS, self.site_rows()),
                 f"baseline features: {self.features}",
                 self.rule_text()]
        lines += [f"note: {n}" for n in self.notes]
        return "\n".join(lines)

    def to_json(self) -> dict:
        return clean_json({
            "source": self.source, "data": self.data, "provenance": self.provenance,
            "evaluation": self.span(),
            "evaluated_points": int(self.evaluated.sum()),
            "anomalous_points": int(self.labels[self.evaluated].sum()),
            "incidents": len(self.incidents), "features": self.features,
            "rule": {"kind": self.rule.kind, "alerting": self.rule.alerting,
                     "alerting_meaning": {k: rep.ALERT_SETTING_TEXT.get(k, "")
                                          for k in self.rule.alerting},
                     "step_s": self.step_s},
            "methods": {m.name: dict(m.metrics, threshold=m.policy_kind)
                        for m in self.methods.values()},
            "glossary": dict(GLOSSARY),
            "sites_meaning": {key: text for key, _, text in SITES},
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


def evaluate(source: Path, data: Path, incidents, eval_from=None,
             eval_mask: Optional[np.ndarray] = None, threshold: str = "pot",
             baselines: Sequence[str] = BASELINES, teacher: bool = True,
             model_dir: Optional[Path] = None,
             alarms_per_week: float = DEFAULT_ALARMS_PER_WEEK,
             labels: Optional[str] = None) -> EvalResult:
    """source: a model directory or a bundle (then model_dir, its teacher's folder, adds the
    teacher and the baselines). incidents: a start,end[,kind] CSV or DataFrame, or None to read
    them from the data file's label column (`labels`, or the one label-like column it holds:
    incidents_in_file). eval_from: first evaluated row (int) or time (str); eval_mask:
    explicit grid points to evaluate (overrides eval_from); baselines: which of BASELINES to
    run (none: ()). threshold and alarms_per_week are
    for a model directory (a bundle uses its own)."""
    bundle, model, rule, notes = _source(source, model_dir, threshold, alarms_per_week)
    options = _reading(bundle, model)
    frame: Frame = load_frame(data, options)
    inc = _incidents(incidents, data, labels, options, notes)
    y = incident_labels(frame.times, inc)
    evaluated = _evaluated(frame, eval_mask, eval_from)
    notes = notes + blank_channel_note(frame, evaluated)
    methods, capture = {}, None
    with tempfile.TemporaryDirectory(prefix="ganlet-evaluate-") as tmp:
        feed = gateway_csv(Path(data), frame.report.time_col, frame.channels, Path(tmp),
                           options.decimal,
                           frame.period_s if frame.report.times_from_rows else None)
        if bundle is not None:
            methods["bundle"], capture = gateway_method(bundle, feed, frame, Path(tmp),
                                                        rule.kind)
        if model is not None and teacher:
            hop = bundle.hop if bundle is not None else 1
            methods["teacher"] = _teacher_method(model, feed, frame, rule, hop)
    if model is not None and baselines:
        methods.update(_baseline_methods(model, frame, rule, baselines))
    if not methods:
        raise UnusableInput("nothing to evaluate")
    t = frame.times.values[evaluated]
    for m in methods.values():
        m.metrics = point_metrics(y[evaluated], m.alert[evaluated])
        m.metrics["sites"] = error_sites(y[evaluated], m.alert[evaluated])
        m.metrics.update(event_metrics(t, y[evaluated], m.alert[evaluated], frame.period_s))
    return EvalResult(source=str(source), data=str(data), times=frame.times, labels=y,
                      evaluated=evaluated, methods=methods, incidents=inc, rule=rule,
                      features=f"each point's {len(frame.channels)} channel levels, "
                               "robust-scaled on the fit span (the data as delivered, whatever "
                               "the detector watches); rolling z-score over the trailing "
                               f"{ROLLING_Z_WINDOW} points",
                      notes=notes,
                      provenance=tested(bundle, model_dir if bundle is not None else source,
                                        data, frame.report.time_col, capture))


def _reading(bundle, model) -> IntakeOptions:
    """How DATA is read against a bundle (its manifest) or a model directory: its columns,
    period, gap filling and the training data's dialect."""
    if bundle is not None:
        return IntakeOptions(time_col=bundle.time_column, channels=list(bundle.channels),
                             period_s=bundle.period_s, max_fill_periods=bundle.max_gap_periods,
                             times_from_rows=times_from_rows(bundle.manifest),
                             **trained_dialect(bundle.manifest))
    return IntakeOptions(time_col=model.time_col, channels=list(model.channels),
                         period_s=model.period_s, max_fill_periods=model.max_fill_periods,
                         times_from_rows=model.times_from_rows, **trained_dialect(model.written))


def _incidents(incidents, data: Path, labels: Optional[str], options: IntakeOptions,
               notes: list) -> pd.DataFrame:
    """The incidents given (a DataFrame or a CSV), else those of DATA's label column (a note
    says which)."""
    if isinstance(incidents, pd.DataFrame):
        return incidents
    if incidents is not None:
        return read_incidents(incidents)
    found, column = incidents_in_file(data, labels, options)
    notes.append(f"incidents: {len(found)} run(s) of labelled rows in the file's column "
                 f"{column!r}")
    return found


def _source(source: Path, model_dir: Optional[Path], threshold: str, alarms_per_week: float):
    """(bundle or None, model or None, the rule, notes) for a bundle or a model directory."""
    from ganlet.compile.train import load_model
    from ganlet.runtime.manifest import BundleError, load_bundle

    notes = []
    if source_kind(source) == "model":
        model = load_model(source)
        rule = Rule(threshold, default_alerting(model.teacher.config.window, 1), alarms_per_week)
        return None, model, rule, _rate_note(model.channels, model.scaler.features)
    try:
        bundle = load_bundle(source, skip_signature=True)  # detection, not trust
    except BundleError as exc:
        raise UnusableInput(f"bundle refused: {exc}") from None
    model = load_model(model_dir) if model_dir is not None else None
    if model is None:
        notes.append("no --model DIR given: the teacher and the baselines (which need its "
                     "training split) are skipped")
    budget = bundle.manifest.get("false_alarms", {}).get("budget_per_week",
                                                         DEFAULT_ALARMS_PER_WEEK)
    drift = bundle.manifest.get("drift", {}).get("action", DRIFT_ACTION)
    rule = Rule(bundle.threshold_policy["kind"], dict(bundle.alerting), budget, drift)
    return bundle, model, rule, notes + _rate_note(bundle.channels, bundle.features)


def _rate_note(channels, features) -> list:
    by_rate = [c for c, f in zip(channels, features) if f == "rate"]
    if not by_rate:
        return []
    return [f"the detector watches {', '.join(by_rate)} by rate (change per period); the "
            "baselines see every channel's level"]


def _evaluated(frame: Frame, eval_mask, eval_from) -> np.ndarray:
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
    # a point with some channel read is one the gateway scores (a blank cell is left out,
    # runtime/blanks.py); only a point with no reading at all is a gap it never sees
    return evaluated & ~np.isnan(frame.values).all(axis=1)


def blank_channel_note(frame: Frame, evaluated: np.ndarray) -> list:
    """What happens to evaluated points with a channel blank (none: nothing to say)."""
    n = int((evaluated & np.isnan(frame.values).any(axis=1)).sum())
    if not n:
        return []
    return [f"{n} evaluated points have a channel blank: the bundle and the teacher score them "
            "as the gateway does (the channel left out); the baselines cannot score them and "
            "raise no alert there"]


def from_opening(alert: np.ndarray, min_hops: int) -> np.ndarray:
    """The alert column as the alerts' own spans: a gateway alert is `opened` at the first of
    the min_hops exceeding hops, while its per-hop alert column turns to 1 on the last of them;
    each run is extended back over those min_hops - 1 hops (they exceeded the level, so they
    cannot overlap the previous alert)."""
    out = np.asarray(alert, bool).copy()
    for start, _ in alert_events(out):
        out[max(0, start - (min_hops - 1)):start] = True
    return out


def _on_grid(frame: Frame, times, score, threshold, alert, name: str, kind: str,
             min_hops: int) -> Method:
    """Per-hop series placed on the data's grid (the intake's rounding), each held until the
    next hop, alerts from their opening hop."""
    n = len(frame.times)
    rows = grid_index(frame, times)
    held_alert = hold(rows, from_opening(alert, min_hops).astype(float), n)
    return Method(name, hold(rows, score, n), hold(rows, threshold, n),
                  np.nan_to_num(held_alert) > 0.5, kind)


def gateway_method(bundle, feed: Path, frame: Frame, workdir: Path, kind: str):
    """The bundle's own `run.py stream` on the feed: what the gateway does; and the
    provenance lines of its scores file."""
    dev = read_scores(run_bundle(bundle.dir, feed, workdir / "gateway").scores)
    return _on_grid(frame, dev["time"].to_numpy(), dev["score"].to_numpy(),
                    dev["threshold"].to_numpy(), dev["alert"].to_numpy(),
                    "bundle (int8, gateway path)", kind, int(bundle.alerting["min_hops"])), \
        dev.attrs.get("provenance", {})


def _teacher_method(model, feed: Path, frame: Frame, rule: Rule, hop: int) -> Method:
    """The teacher as the device's network: calibrated as compile calibrates the student, then
    the same feed through the gateway's Detector."""
    from ganlet.compile.train import TeacherScorer

    scorer = TeacherScorer(model.teacher)
    bundle = calibrated_bundle(model, scorer, model.teacher.config.window, hop, rule.kind,
                               rule.alarms_per_week, rule.alerting, rule.drift)
    r = replay_feed(bundle, scorer, feed)
    return _on_grid(frame, r.times, r.score, r.threshold, r.alert, "teacher",
                    bundle.threshold_policy["kind"], int(bundle.alerting["min_hops"]))


def _baseline_methods(model, frame: Frame, rule: Rule, names: Sequence[str]) -> dict:
    train_levels, data_levels = level_views(model, frame)
    (f0, f1), (c0, c1) = model.spans.fit, model.spans.calibration
    fit = train_levels[f0:f1]
    base = baseline_scores(fit[np.isfinite(fit).all(axis=1)],
                           np.vstack([train_levels[c0:c1], data_levels]))
    base_cal = {k: v[: c1 - c0] for k, v in base.items()}
    base_all = {k: v[c1 - c0:] for k, v in base.items()}
    base_cal["rolling z-score"] = rolling_z(train_levels[:c1])[c0:c1]
    base_all["rolling z-score"] = rolling_z(data_levels)
    methods = {}
    for name in names:
        pol, levels, alert = rule.apply(base_cal[name], base_all[name], frame.period_s,
                                        None if model.raw is None else model.raw[:c1],
                                        frame.values)
        alert = alert & np.isfinite(base_all[name])  # a point it cannot score: no verdict
        methods[name] = Method(name, base_all[name], levels, alert, pol["kind"])
    return methods


# ---------------------------------------------------------------------------------------------
# report


def tested(bundle, model_dir, data, time_col: str, capture: Optional[dict]) -> dict:
    """What an evaluation tested: report.py's parts (bundle or model directory, data, the
    gateway run that scored the bundle, this workstation)."""
    from ganlet.runtime.manifest import file_sha256

    out = {"report": rep.workstation(), "data": rep.data_facts(data, time_col)}
    if bundle is not None:
        out["bundle"] = rep.bundle_facts(bundle)
        out["device"] = rep.device_facts(capture or {}, "workstation run of the bundle's "
                                                        "run.py stream (numpy backend)")
    if model_dir is not None:
        out["model"] = {"path": str(model_dir),
                        "model_json_sha256": file_sha256(Path(model_dir) / "model.json")}
    return out


def score_label(result: EvalResult, key: str) -> str:
    unit = "dimensionless"
    if key == "bundle":
        unit = result.provenance.get("bundle", {}).get("score_unit_short", unit)
    return f"score [{unit}]"


def plot_traces(result: EvalResult) -> bytes:
    plt = rep.pyplot()
    names = list(result.methods)
    fig, axes = plt.subplots(len(names), 1, figsize=(12, 1.8 * len(names) + 1.0), sharex=True,
                             constrained_layout=True, squeeze=False)
    t = result.times
    start = result.span().get("first_row")
    for k, key in enumerate(names):
        m, ax = result.methods[key], axes[k, 0]
        rep.shade_runs(ax, t, ~result.evaluated, "0.85", 0.5, "not evaluated")
        rep.shade_runs(ax, t, result.labels, "tab:orange", 0.25, "incident")
        rep.shade_runs(ax, t, m.alert & result.evaluated, "tab:red", 0.25, "alert open")
        ax.plot(t, m.scores, lw=0.6, color=rep.colour(key, k), label="score")
        ax.plot(t, m.thresholds, lw=0.8, color="tab:red", ls="--", label="threshold")
        if start is not None:
            ax.axvline(t[start], color="black", lw=1.4, ls="-.",
                       label="evaluation starts" if k == 0 else None)
        rep.positive_log_axis(ax, [m.scores])
        ax.set_ylabel(f"{m.name.split(' (')[0]}\n{score_label(result, key)}", fontsize=8)
        ax.set_title(f"{m.name}: F1 {m.metrics.get('f1', float('nan')):.3f}, false-alarm rate "
                     f"{m.metrics.get('far', 0):.3f}", fontsize=9, loc="left")
        if k == 0:
            ax.legend(loc="upper left", fontsize=8, ncol=6)
    rep.time_axis(axes[-1, 0])
    fig.suptitle("scores and thresholds; incidents shaded orange, open alerts red, points "
                 "not evaluated grey")
    return rep.figure_png(fig)


def rule_html(result: EvalResult) -> str:
    steps = result.step_s
    step_s = steps.get("bundle hop", steps["point"])
    table = rep.html_table(["setting", "value", "meaning", "as time"],
                           [["threshold policy", result.rule.kind,
                             rep.POLICY_TEXT.get(result.rule.kind, ""), "-"],
                            ["false-alarm budget", f"{result.rule.alarms_per_week:g} a week",
                             "alarms a week on normal data the threshold is calibrated to",
                             "-"],
                            ["drift", result.rule.drift,
                             "a channel drifting out of its training range: "
                             + action_summary(result.rule.drift), "-"],
                            ["steps", "bundle and teacher",
                             STEP_TEXT + " (where the drift section says so, as compile's "
                             "default does; the baselines have no drift monitor)", "-"],
                            ["cusum", "with pot",
                             "a CUSUM of the log score also alerts on a rise held over many "
                             "steps, fitted for the same budget (shared), where a method's "
                             f"calibration scores are positive and show {MIN_EXCURSIONS} "
                             "excursions of its evidence", "-"],
                            ["held readings", "per channel",
                             "a reading repeated more times in a row than its normal history "
                             "makes plausible also alerts (a hundredth of the budget); "
                             "channels whose history holds long runs are not watched", "-"]]
                           + rep.alert_settings_rows(result.rule.alerting, step_s))
    note = (f"One step is one score: for the bundle one hop = {rep.duration(step_s)}; "
            if "bundle hop" in steps else "One step is one score: ")
    note += (f"the teacher and the baselines score every grid point "
             f"({rep.duration(steps['point'])}). The same settings apply to every method; each "
             "method's threshold is calibrated on its own calibration-span scores.")
    return table + rep.paragraph(note, "note")


def write_html(result: EvalResult, path: Path) -> Path:
    sections = [
        ("Summary", rep.paragraph(
            f"{int(result.evaluated.sum())} points evaluated, "
            f"{int(result.labels[result.evaluated].sum())} inside {len(result.incidents)} "
            f"incidents. Source: {result.source}.") + rep.paragraph(result.span_text() + ".")),
        ("What was tested", rep.facts_table(result.provenance)),
        ("Methods side by side", rep.html_table(result.HTML_HEADERS, result.table_rows())
         + rep.definitions(GLOSSARY)
         + rep.paragraph(f"Baseline features: {result.features}.", "note")),
        ("Where the wrong points sit", rep.html_table(result.SITE_HEADERS, result.site_rows())
         + rep.definitions([(f"FP {head}" if k < 3 else f"FN {head}", text)
                            for k, (_, head, text) in enumerate(SITES)])
         + rep.paragraph("Before and after say the alerts and the labels disagree on where an "
                         "incident starts and ends; apart and unseen are false alarms and "
                         "misses outright.", "note")),
        ("Threshold rule and alert settings", rule_html(result)),
        ("Incidents", rep.html_table(["start (UTC)", "end (UTC)", "kind"],
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
