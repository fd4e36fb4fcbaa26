"""Parity: the device's scores and alerts against the workstation's, on one stream.

Series, all at the hops the device scored:
  device        the bundle's gateway path: `run.py stream --scores-out` (spawned here on the
                workstation with --backend numpy, compile/gateway.py), or a scores CSV captured
                on the device
  onnxruntime   the bundle's int8 model.onnx in onnxruntime
  numpy         the bundle's int8 weights through runtime.lstm.Network
  fp32 student  the student before quantisation (the model directory's record, --model)
  teacher       the torch teacher (E then G) of the model directory (--model)
Every workstation series is the same stream fed row by row through the gateway's own detector
(runtime/detector.py: intake, gap filling, features, scaling, ring, score rule, threshold policy,
alert machine), with only the network backend swapped; so alerts compare one to one, and rows
the gateway refuses (repeated or out-of-order times) are refused for every series alike.

Judging: pairs that share the int8 weights (device vs onnxruntime, device vs numpy) must agree
to float rounding (score_rel, spearman_min, sample_agreement_min, every alert event matched
within event_match_hops). The fp32 student and the teacher are different networks: those pairs
are judged by rank correlation only (teacher_spearman_min).
"""

from __future__ import annotations

import json
import tempfile
from dataclasses import asdict, dataclass, field, fields
from pathlib import Path
from typing import Optional, Sequence

import numpy as np
import pandas as pd
from scipy.stats import spearmanr

from ganlet.compile import report as rep
from ganlet.compile.data import parse_times, runs
from ganlet.compile.gateway import (
    UnusableInput,
    check_scores_bundle,
    gateway_csv,
    read_scores,
    run_bundle,
)
from ganlet.runtime.clock import JUMP, REFUSE, Timeline
from ganlet.runtime.detector import Detector, Judge
from ganlet.runtime.intake import Dialect, RowError
from ganlet.runtime.manifest import (
    PARITY_TOLERANCES,
    Bundle,
    BundleError,
    load_bundle,
    times_from_rows,
    trained_dialect,
)
from ganlet.runtime.scorer import NetworkScorer, make_scorer
from ganlet.runtime.sources import CsvSource
from ganlet.runtime.thresholds import HELD_KEY

STRICT = ("onnxruntime", "numpy")          # share the int8 weights with the device


@dataclass
class Tolerances:
    score_rel: float = PARITY_TOLERANCES["score_rel"]
    spearman_min: float = PARITY_TOLERANCES["spearman_min"]
    sample_agreement_min: float = PARITY_TOLERANCES["sample_agreement_min"]
    event_match_hops: int = PARITY_TOLERANCES["event_match_hops"]
    teacher_spearman_min: float = PARITY_TOLERANCES["teacher_spearman_min"]

    @classmethod
    def from_manifest(cls, manifest: dict, overrides: Sequence[str] = ()) -> Tolerances:
        given = dict(manifest.get("parity", {}).get("tolerances", {}))
        names = {f.name for f in fields(cls)}
        tol = cls(**{k: v for k, v in given.items() if k in names})
        for item in overrides:
            if "=" not in item:
                raise UnusableInput(f"--tolerance {item!r}: use KEY=VALUE, e.g. score_rel=1e-3")
            key, value = (s.strip() for s in item.split("=", 1))
            if key not in names:
                raise UnusableInput(f"--tolerance {key!r} unknown; choose from "
                                    f"{', '.join(sorted(names))}")
            try:
                number = int(value) if key == "event_match_hops" else float(value)
            except ValueError:
                raise UnusableInput(f"--tolerance {key}={value!r} is not a number") from None
            setattr(tol, key, number)
        return tol


TOLERANCE_TEXT = {
    "score_rel": "largest relative score difference |other - device| / |device| on any hop "
                 "(pairs sharing the int8 weights)",
    "spearman_min": "lowest Spearman rank correlation of the scores (pairs sharing the int8 "
                    "weights)",
    "sample_agreement_min": "lowest share of hops on which both series agree whether an alert "
                            "is open (pairs sharing the int8 weights)",
    "event_match_hops": "an alert opening matches one in the other series when the two starts "
                        "are at most this many hops apart; every alert must match (pairs "
                        "sharing the int8 weights)",
    "teacher_spearman_min": "lowest Spearman rank correlation against the fp32 student and the "
                            "teacher (other networks: judged by rank only)",
}


def failed_checks(pair: dict, tol: Tolerances) -> list:
    """Each failed check of one pair: the tolerance it broke, the value, and by how much."""
    out = []
    for check, ok in pair.get("checks", {}).items():
        if not ok:
            out.append(_failure(check, pair, tol))
    return out


def _failure(check: str, pair: dict, tol: Tolerances) -> dict:
    if check == "score_rel":
        value, limit = pair["max_rel_error"], tol.score_rel
        text = (f"score_rel: max relative error {value:.3g} exceeds {limit:g} by "
                f"{value - limit:.3g} ({value / limit:.3g} times the tolerance)")
        return {"tolerance": "score_rel", "limit": limit, "value": value,
                "by": value - limit, "text": text}
    if check == "spearman":
        name = "spearman_min" if pair["strict"] else "teacher_spearman_min"
        value, limit = pair["spearman"], getattr(tol, name)
        if not np.isfinite(value):
            return {"tolerance": name, "limit": limit, "value": None, "by": None,
                    "text": f"{name}: Spearman undefined (fewer than 3 hops scored by both, "
                            "or a constant series)"}
        return {"tolerance": name, "limit": limit, "value": value, "by": limit - value,
                "text": f"{name}: Spearman {value:.6g} is {limit - value:.3g} below {limit:g}"}
    if check == "sample_agreement":
        value, limit = pair["sample_agreement"], tol.sample_agreement_min
        return {"tolerance": "sample_agreement_min", "limit": limit, "value": value,
                "by": limit - value,
                "text": f"sample_agreement_min: alert state agrees on {value:.2%} of hops, "
                        f"{(limit - value) * 100:.2f} points below {limit:.2%}"}
    ev = pair["events"]
    unmatched = len(ev["only_device"]) + len(ev["only_other"])
    return {"tolerance": "event_match_hops", "limit": tol.event_match_hops, "value": unmatched,
            "by": unmatched,
            "text": f"event_match_hops: {len(ev['only_device'])} device alert(s) and "
                    f"{len(ev['only_other'])} other alert(s) have no partner within "
                    f"{tol.event_match_hops} hops"}


# ---------------------------------------------------------------------------------------------
# the same stream through the gateway's detector, one backend at a time


@dataclass
class Replay:
    """Per hop: time (datetime64), score, threshold, alert open; and the rows refused."""

    times: np.ndarray
    score: np.ndarray
    threshold: np.ndarray
    alert: np.ndarray
    refused: dict


def replay_feed(bundle: Bundle, scorer, feed: Path,
                device_scores: Optional[dict] = None) -> Replay:
    """Feed a CSV through runtime.detector.Detector as `run.py stream --replay` does, with
    `scorer`: the bundle's time zone and date order, and jumps in time held until confirmed
    (clock.Timeline).
    With `device_scores` ({hop time in epoch milliseconds: score}) the Judge takes the device's
    score at each of its hops instead of the scorer's, while drift, steps, state changes and
    held readings still come from the rows: does the device's alert column follow from its
    own scores?"""
    det = Detector(bundle, scorer)
    if device_scores is not None:
        judge_step = det.judge.step
        det.judge.step = lambda t, score, *context: judge_step(
            t, device_scores.get(round(t * 1000), score), *context)
    timeline = Timeline(bundle.period_s, bundle.max_gap_periods)
    refused = {}
    hops = []

    def apply(step) -> None:
        if step.action == JUMP:
            if step.jump["direction"] == "backward":
                det.restart_clock()
            return
        try:
            if step.action == REFUSE:
                raise step.error
            events = det.feed(step.time, step.item.values)
        except RowError as exc:  # refused by time order or range, as on the gateway
            refused[exc.kind] = refused.get(exc.kind, 0) + 1
            return
        hops.extend(e for e in events if e["event"] == "score")

    dialect = Dialect(**{**trained_dialect(bundle.manifest), "decimal": "."})  # gateway_csv's
    with open(feed, "rb") as fh:
        for rec in CsvSource(fh, bundle.time_column, bundle.channels, dialect=dialect):
            if rec.values is None:  # blank, header or refused line
                if rec.error is not None:
                    refused[rec.error.kind] = refused.get(rec.error.kind, 0) + 1
                continue
            for step in timeline.offer(rec.time, rec, det.last_time):
                apply(step)
    for step in timeline.flush(det.last_time):
        apply(step)
    return Replay(parse_times(pd.Series([e["time"] for e in hops], dtype=object)).to_numpy(),
                  np.array([np.nan if e["score"] is None else e["score"] for e in hops], float),
                  np.array([np.nan if e["threshold"] is None else e["threshold"] for e in hops],
                           float),
                  np.array([e["alert_open"] for e in hops], bool), refused)


def replay_alerts(scores: np.ndarray, policy: dict, alerting: dict,
                  readings: Optional[np.ndarray] = None):
    """(thresholds, alert_open) per hop of a score series, through the gateway's Judge. Held
    readings are judged on the raw readings at each hop ([hops, channels], one row per hop),
    which a score series alone does not carry: without them they are left out."""
    if readings is None:
        policy = {k: v for k, v in policy.items() if k != HELD_KEY}
        names = []
    else:
        names = [str(c) for c in range(np.shape(readings)[1])]
    judge = Judge("", names, names, policy, alerting)
    levels = np.empty(len(scores))
    open_ = np.zeros(len(scores), bool)
    for k, s in enumerate(np.asarray(scores, float)):
        if readings is not None:
            judge.see(readings[k])
        judge.step(0.0, float(s))
        levels[k], open_[k] = judge.level, judge.is_open
    return levels, open_


def alert_events(alert: np.ndarray) -> list:
    """Runs of open alert as half-open (first, end) index pairs."""
    return runs(np.asarray(alert, bool))


def match_events(a: list, b: list, tolerance: int):
    """One-to-one matching of events by start, |start_a - start_b| <= tolerance hops, nearest
    first. Returns (pairs [(i, j)], unmatched indices of a, unmatched indices of b)."""
    candidates = sorted((abs(sa - sb), i, j) for i, (sa, _) in enumerate(a)
                        for j, (sb, _) in enumerate(b) if abs(sa - sb) <= tolerance)
    used_a, used_b, pairs = set(), set(), []
    for _, i, j in candidates:
        if i not in used_a and j not in used_b:
            used_a.add(i)
            used_b.add(j)
            pairs.append((i, j))
    pairs.sort()
    return (pairs, [i for i in range(len(a)) if i not in used_a],
            [j for j in range(len(b)) if j not in used_b])


# ---------------------------------------------------------------------------------------------
# comparing two series


def compare(times: np.ndarray, ref: dict, other: dict, tol: Tolerances, strict: bool) -> dict:
    """ref/other: {"score", "alert"} arrays per hop (NaN where a series has no score)."""
    a, b = np.asarray(ref["score"], float), np.asarray(other["score"], float)
    ok = np.isfinite(a) & np.isfinite(b)
    n = int(ok.sum())
    out = {"n": n, "strict": strict}
    if n >= 3:
        err = np.abs(b[ok] - a[ok])
        out["max_abs_error"] = float(err.max())
        out["max_rel_error"] = float((err / np.maximum(np.abs(a[ok]), 1e-12)).max())
        rho = spearmanr(a[ok], b[ok]).statistic      # reference: scipy.stats.spearmanr
        out["spearman"] = float(rho) if np.isfinite(rho) else float("nan")
    else:
        out.update(max_abs_error=float("nan"), max_rel_error=float("nan"),
                   spearman=float("nan"))
    out["sample_agreement"] = float(np.mean(ref["alert"] == other["alert"]))
    out["events"] = _event_figures(times, ref["alert"], other["alert"], tol.event_match_hops)
    checks = {}
    if strict:
        checks["score_rel"] = bool(out["max_rel_error"] <= tol.score_rel)
        checks["spearman"] = bool(out["spearman"] >= tol.spearman_min)
        checks["sample_agreement"] = bool(out["sample_agreement"] >= tol.sample_agreement_min)
        checks["events"] = not out["events"]["only_device"] and not out["events"]["only_other"]
    else:
        checks["spearman"] = bool(out["spearman"] >= tol.teacher_spearman_min)
    out["checks"] = checks
    out["passed"] = all(checks.values())
    return out


def _event_figures(times: np.ndarray, ref_alert, other_alert, match_hops: int) -> dict:
    ev_a, ev_b = alert_events(ref_alert), alert_events(other_alert)
    pairs, miss_a, miss_b = match_events(ev_a, ev_b, match_hops)
    step = np.timedelta64(1, "s")
    return {
        "device": len(ev_a), "other": len(ev_b), "matched": len(pairs),
        "only_device": [_utc(times[ev_a[i][0]]) for i in miss_a],
        "only_other": [_utc(times[ev_b[j][0]]) for j in miss_b],
        "agreement": 1.0 if not ev_a and not ev_b else 2 * len(pairs) / (len(ev_a) + len(ev_b)),
        "first_alert_delta_s": [
            {"device": _utc(times[ev_a[i][0]]),
             "delta_s": float((times[ev_b[j][0]] - times[ev_a[i][0]]) / step)}
            for i, j in pairs],
    }


def _utc(t) -> str:
    """A hop time as ISO 8601 UTC ('Z'), milliseconds only when it has them."""
    text = np.datetime_as_string(np.datetime64(t, "ms"))
    return (text[:-4] if text.endswith(".000") else text) + "Z"


# ---------------------------------------------------------------------------------------------
# the workstation's backends


def workstation_scorers(bundle: Bundle, model_dir: Optional[Path], notes: list) -> dict:
    """name -> network backend for each workstation series that can be computed here."""
    scorers = {}
    try:
        scorers["onnxruntime"] = make_scorer(bundle, "onnxruntime")
    except BundleError as exc:
        notes.append(f"device vs onnxruntime skipped: {exc}")
    scorers["numpy"] = make_scorer(bundle, "numpy")
    if model_dir is None:
        notes.append("no --model DIR given: device vs fp32 student and vs teacher skipped "
                     "(the bundle carries nothing of the workstation)")
        return scorers
    if not (Path(model_dir) / "model.json").is_file():
        raise UnusableInput(f"--model {model_dir}: not a model directory (no model.json)")
    from ganlet.compile.pipeline import student_file
    from ganlet.compile.train import TeacherScorer, load_model

    student = student_file(model_dir, bundle.bundle_id)
    if student.is_file():
        with np.load(student, allow_pickle=False) as npz:
            scorers["fp32 student"] = NetworkScorer(dict(npz), "fp32 student")
    else:
        notes.append(f"{model_dir} holds no record of this bundle ({bundle.bundle_id[:12]}; "
                     "compiled from another model directory?): device vs fp32 student skipped")
    scorers["teacher"] = TeacherScorer(load_model(model_dir).teacher)
    return scorers


@dataclass
class VerifyResult:
    bundle: str
    data: str
    device_source: str
    times: np.ndarray
    series: dict                    # name -> {"score", "threshold", "alert"} per hop
    pairs: dict                     # other name -> compare() result against the device
    tolerances: Tolerances
    notes: list = field(default_factory=list)
    hops: int = 0
    device_replay_agreement: float = float("nan")
    provenance: dict = field(default_factory=dict)   # report.provenance parts: what was tested

    @property
    def passed(self) -> bool:
        judged = [p for p in self.pairs.values() if p.get("checks")]
        return bool(judged) and all(p["passed"] for p in judged)

    def failures(self, name: str) -> list:
        return failed_checks(self.pairs[name], self.tolerances)

    def to_json(self) -> dict:
        pairs = {name: dict(p, failed=self.failures(name)) for name, p in self.pairs.items()}
        return {"passed": self.passed, "bundle": self.bundle, "data": self.data,
                "device_source": self.device_source, "hops": self.hops,
                "provenance": self.provenance,
                "device_alert_replay_agreement": self.device_replay_agreement,
                "tolerances": asdict(self.tolerances), "tolerance_meaning": TOLERANCE_TEXT,
                "pairs": pairs, "notes": self.notes,
                "judging": "pairs sharing the int8 weights (device vs onnxruntime, device vs "
                           "numpy) are held to the strict tolerances; pairs against the fp32 "
                           "student and the teacher are different networks and are judged by "
                           "teacher_spearman_min only"}

    def pair_rows(self) -> list:
        """One row per compared pair, for the terminal table and the HTML report alike."""
        rows = []
        for name, p in self.pairs.items():
            ev = p["events"]
            rows.append([f"device vs {name}", p["n"], p["max_abs_error"], p["max_rel_error"],
                         p["spearman"], p["sample_agreement"],
                         f"{ev['matched']} of {ev['device']} / {ev['other']}",
                         "strict" if p["strict"] else "rank only",
                         "PASS" if p["passed"] else "FAIL"])
        return rows

    def summary(self) -> str:
        rows = self.pair_rows()
        lines = [f"parity of {self.bundle} on {self.data} ({self.hops} hops, device = "
                 f"{self.device_source})",
                 rep.text_table(["pair", "hops", "max abs err", "max rel err", "spearman",
                                 "alert agree", "events matched (of device / other)",
                                 "judged", "result"], rows)]
        for name in self.pairs:
            lines += [f"FAIL device vs {name}: {f['text']}" for f in self.failures(name)]
        lines += [f"note: {n}" for n in self.notes]
        lines.append("PASS" if self.passed else "FAIL")
        return "\n".join(lines)


def verify(bundle_dir: Path, data: Path, device_scores: Optional[Path] = None,
           model_dir: Optional[Path] = None, tolerances: Sequence[str] = ()) -> VerifyResult:
    try:
        bundle = load_bundle(bundle_dir, skip_signature=True)  # parity, not trust
    except BundleError as exc:
        raise UnusableInput(f"bundle refused: {exc}") from None
    tol = Tolerances.from_manifest(bundle.manifest, tolerances)
    notes = []
    with tempfile.TemporaryDirectory(prefix="ganlet-verify-") as tmp:
        feed = gateway_csv(Path(data), bundle.time_column, bundle.channels, Path(tmp),
                           trained_dialect(bundle.manifest)["decimal"],
                           bundle.period_s if times_from_rows(bundle.manifest) else None)
        if device_scores is None:
            device = read_scores(run_bundle(bundle.dir, feed, Path(tmp) / "gateway").scores)
            source = "workstation run of the bundle's run.py stream (numpy backend)"
        else:
            device = read_scores(device_scores)
            check_scores_bundle(device, bundle.bundle_id, bundle.manifest["name"])
            source = f"device capture {device_scores}"
        times = device["time"].to_numpy()
        dev = {"score": device["score"].to_numpy(float),
               "threshold": device["threshold"].to_numpy(), "alert": device["alert"].to_numpy(bool)}
        scorers = workstation_scorers(bundle, model_dir, notes)
        replays = {name: replay_feed(bundle, scorer, feed) for name, scorer in scorers.items()}
        # the device's own scores, judged with the context of the rows (the first scorer only
        # supplies what the Judge needs beside the score)
        own = replay_feed(bundle, next(iter(scorers.values())), feed,
                          device_scores=dict(zip(epoch_ms(times), dev["score"])))
    _note_alignment(notes, times, next(iter(replays.values())))
    replay_agreement = float(np.mean(_at_device_hops(times, own)["alert"] == dev["alert"]))
    _note_replay(notes, replay_agreement)
    series, pairs = {"device": dev}, {}
    for name, r in replays.items():
        series[name] = _at_device_hops(times, r)
        pairs[name] = compare(times, dev, series[name], tol, strict=name in STRICT)
    provenance = {"report": rep.workstation(), "bundle": rep.bundle_facts(bundle),
                  "data": rep.data_facts(data, bundle.time_column),
                  "device": rep.device_facts(device.attrs.get("provenance", {}), source)}
    return VerifyResult(bundle=str(bundle.dir), data=str(data), device_source=source,
                        times=times, series=series, pairs=pairs, tolerances=tol, notes=notes,
                        hops=len(times), device_replay_agreement=replay_agreement,
                        provenance=provenance)


def _note_replay(notes: list, agreement: float) -> None:
    if agreement < 1.0:
        notes.append(f"replaying the device's own scores through the gateway's judge (with the "
                     "drift, steps, state changes and held readings of DATA) reproduces its "
                     f"alert column on {agreement:.2%} of hops (a restart from a checkpoint "
                     "mid-stream, or a different runtime, would explain a difference)")


def epoch_ms(times: np.ndarray) -> list:
    """Naive UTC datetimes -> epoch milliseconds, the key replay_feed's device_scores takes."""
    return [int(v) for v in np.asarray(times).astype("datetime64[ms]").astype(np.int64)]


def _at_device_hops(times: np.ndarray, r: Replay) -> dict:
    """A workstation series at the device's hop times (NaN / closed where it has no hop)."""
    index = pd.Index(r.times)
    at = index.get_indexer(times)
    have = at >= 0
    pick = lambda values, empty: np.where(have, values[np.maximum(at, 0)], empty)  # noqa: E731
    return {"score": pick(r.score, np.nan), "threshold": pick(r.threshold, np.nan),
            "alert": pick(r.alert, False).astype(bool)}


def _note_alignment(notes: list, times: np.ndarray, r: Replay) -> None:
    if r.refused:
        kinds = ", ".join(f"{k} {v}" for k, v in sorted(r.refused.items()))
        notes.append(f"the gateway's intake refused rows of DATA ({kinds}); every series "
                     "skipped the same rows")
    missing = int((pd.Index(r.times).get_indexer(times) < 0).sum())
    if missing:
        notes.append(f"{missing} device hops have no hop at the same time in the workstation's "
                     "replay of DATA (was the device fed other data, or resumed mid-stream?); "
                     "they count as disagreements")
    extra = len(r.times) - (len(times) - missing)
    if extra > 0:
        notes.append(f"the workstation's replay scored {extra} hops the device did not report")


# ---------------------------------------------------------------------------------------------
# the HTML report


def plots(result: VerifyResult) -> list:
    unit = result.provenance.get("bundle", {}).get("score_unit_short", "dimensionless")
    figs = [("score overlay", _overlay_png(result, unit))]
    if len(result.series) > 1:
        figs.append(("device vs workstation scatter", _scatter_png(result, unit)))
        figs.append(("error histogram", _error_histogram_png(result)))
    return figs


def _overlay_png(result: VerifyResult, unit: str) -> bytes:
    plt = rep.pyplot()
    t, names = result.times, list(result.series)
    fig, axes = plt.subplots(len(names), 1, figsize=(12, 1.9 * len(names) + 0.9), sharex=True,
                             constrained_layout=True, squeeze=False)
    for k, name in enumerate(names):
        ax, s = axes[k, 0], result.series[name]
        ax.plot(t, s["score"], lw=0.7, color=rep.colour(name, k), label=f"{name} score")
        ax.plot(t, s["threshold"], lw=0.9, color="tab:red", ls="--", label="threshold")
        rep.shade_runs(ax, t, s["alert"], "tab:red", 0.18, "alert open")
        rep.positive_log_axis(ax, [s["score"], s["threshold"]])
        ax.set_ylabel(f"{name}\nscore [{unit}]", fontsize=9)
        ax.legend(loc="upper left", fontsize=8, ncol=3)
    axes[0, 0].set_title("score, threshold and open alerts at the device's hops")
    rep.time_axis(axes[-1, 0])
    return rep.figure_png(fig)


def _scatter_png(result: VerifyResult, unit: str) -> bytes:
    plt = rep.pyplot()
    others = [n for n in result.series if n != "device"]
    fig, axes = plt.subplots(1, len(others), figsize=(3.6 * len(others) + 0.5, 3.9),
                             constrained_layout=True, squeeze=False)
    dev = result.series["device"]["score"]
    for k, name in enumerate(others):
        ax, o = axes[0, k], result.series[name]["score"]
        ok = np.isfinite(dev) & np.isfinite(o)
        ax.scatter(dev[ok], o[ok], s=5, alpha=0.5, color=rep.colour(name, k))
        if ok.any():
            lo = max(min(dev[ok].min(), o[ok].min()), 1e-12)
            hi = max(dev[ok].max(), o[ok].max())
            ax.plot([lo, hi], [lo, hi], color="grey", lw=0.8, ls=":", label="equal")
            if hi / lo > 10:
                ax.set_xscale("log")
                ax.set_yscale("log")
        ax.set_title(f"{name}\nSpearman {rep.fmt(result.pairs[name]['spearman'], 6)}",
                     fontsize=9)
        ax.set_xlabel(f"device score [{unit}]")
        ax.set_ylabel(f"{name} score [{unit}]")
    return rep.figure_png(fig)


def _error_histogram_png(result: VerifyResult) -> bytes:
    plt = rep.pyplot()
    fig, ax = plt.subplots(figsize=(8, 3.8), constrained_layout=True)
    dev = result.series["device"]["score"]
    for k, name in enumerate(n for n in result.series if n != "device"):
        o = result.series[name]["score"]
        ok = np.isfinite(dev) & np.isfinite(o)
        rel = np.abs(o[ok] - dev[ok]) / np.maximum(np.abs(dev[ok]), 1e-12)
        if len(rel):
            ax.hist(np.log10(np.maximum(rel, 1e-12)), bins=60, histtype="step", lw=1.4,
                    color=rep.colour(name, k), label=name)
    ax.axvline(np.log10(result.tolerances.score_rel), color="tab:red", ls="--",
               label=f"score_rel tolerance {result.tolerances.score_rel:g}")
    ax.set_xlabel("log10 of the relative score error against the device (dimensionless; "
                  "exact matches at -12)")
    ax.set_ylabel("hops (count)")
    ax.set_title("relative score error per hop")
    ax.legend(fontsize=8)
    return rep.figure_png(fig)


def pair_table(result: VerifyResult) -> str:
    headers = ["pair", "hops", "max abs err", "max rel err", "Spearman", "alert agreement",
               "events matched (of device / other)", "judged", "result",
               "failed tolerance: by how much"]
    rows = [row + [rep.lines_html([f["text"] for f in result.failures(name)])]
            for row, name in zip(result.pair_rows(), result.pairs)]
    classes = ["pass" if p["passed"] else "fail" for p in result.pairs.values()]
    return rep.html_table(headers, rows, classes)


def event_rows(result: VerifyResult) -> list:
    rows = []
    for name, p in result.pairs.items():
        for d in p["events"]["first_alert_delta_s"]:
            rows.append([name, d["device"], d["delta_s"]])
        rows += [[name, s, "no matching alert"] for s in p["events"]["only_device"]]
        rows += [[name, f"(only {name}) {s}", "no device alert"]
                 for s in p["events"]["only_other"]]
    return rows


def tolerance_rows(result: VerifyResult) -> list:
    return [[k, v, TOLERANCE_TEXT.get(k, "")] for k, v in asdict(result.tolerances).items()]


def verdict_html(result: VerifyResult) -> str:
    word = "PASS" if result.passed else "FAIL"
    cls = "verdict-pass" if result.passed else "verdict-fail"
    failed = [f"device vs {n}: {f['text']}" for n in result.pairs for f in result.failures(n)]
    body = (f'<p><span class="{cls}">{word}</span>: {result.hops} hops compared; device = '
            f"{rep.html.escape(result.device_source)}.</p>")
    return body + "".join(rep.paragraph(f) for f in failed)


def write_html(result: VerifyResult, path: Path) -> Path:
    deltas = event_rows(result)
    sections = [
        ("Verdict", verdict_html(result)),
        ("What was tested", rep.facts_table(result.provenance)),
        ("Pairs", pair_table(result) + rep.paragraph(
            "Pairs sharing the int8 weights (device vs onnxruntime, device vs numpy) are held "
            "to the strict tolerances. The fp32 student and the teacher are different networks: "
            "those pairs are judged by rank correlation only (teacher_spearman_min).", "note")),
        ("Tolerances applied", rep.html_table(["tolerance", "value", "meaning"],
                                              tolerance_rows(result))),
        ("Alert events: first-alert time difference (other minus device)",
         rep.html_table(["series", "device alert opened (UTC)", "difference (s)"], deltas)
         if deltas else rep.paragraph("no alert events in any series")),
    ]
    if result.notes:
        sections.append(("Notes", "".join(rep.paragraph(n) for n in result.notes)))
    for title, png in plots(result):
        sections.append((title.capitalize(), rep.html_image(png, title)))
    Path(path).write_text(rep.html_page("ganlet parity report", sections))
    return Path(path)


def write_json(result: VerifyResult, path: Path) -> Path:
    text = json.dumps(clean_json(result.to_json()), indent=2, allow_nan=False)
    Path(path).write_text(text + "\n")
    return Path(path)


def clean_json(obj):
    """Plain JSON for CI tools: numpy scalars unwrapped, NaN and inf as null."""
    if isinstance(obj, dict):
        return {str(k): clean_json(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [clean_json(v) for v in obj]
    if isinstance(obj, (np.floating, float)):
        return float(obj) if np.isfinite(obj) else None
    if isinstance(obj, (np.integer, np.bool_)):
        return obj.item()
    return obj
