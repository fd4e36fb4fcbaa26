"""Parity: the device's scores and alerts against the workstation's, on one stream.

Series, all at the hop times the device scored:
  device        the bundle's gateway path: `run.py stream --scores-out` (spawned here on the
                workstation with --backend numpy), or a scores CSV captured on the device
  onnxruntime   the bundle's int8 model.onnx in onnxruntime
  numpy         the bundle's int8 weights through runtime.lstm.Network in one batch
  fp32 student  the student before quantisation (its npz beside the teacher)
  teacher       the torch teacher (E then G)
The workstation windows come from compile.data.load_frame and the bundle's scaler. Each
workstation series goes through the bundle's own threshold policy and alert machine, hop by
hop, as the device does, so alerts compare one to one.

Judging: pairs that share the int8 weights (device vs onnxruntime, device vs numpy) must agree
to float rounding (score_rel, spearman_min, sample_agreement_min, every alert event matched
within event_match_hops). The fp32 student and the teacher are different networks: those pairs
are judged by rank correlation only (teacher_spearman_min).
"""

from __future__ import annotations

import json
import subprocess
import sys
import tempfile
from dataclasses import asdict, dataclass, field, fields
from pathlib import Path
from typing import Optional, Sequence

import numpy as np
import pandas as pd
from scipy.stats import spearmanr

from ganlet.compile import report as rep
from ganlet.compile.data import (
    Frame,
    IntakeError,
    IntakeOptions,
    grid_index,
    load_frame,
    parse_times,
    read_table,
)
from ganlet.runtime.alerts import AlertMachine
from ganlet.runtime.features import series as feature_series
from ganlet.runtime.lstm import Network, score_from_residuals
from ganlet.runtime.manifest import Bundle, BundleError, load_bundle
from ganlet.runtime.thresholds import make_threshold

STRICT = ("onnxruntime", "numpy")          # share the int8 weights with the device
LOOSE = ("fp32 student", "teacher")        # different networks: rank agreement only


class UnusableInput(ValueError):
    """The inputs cannot be compared at all (exit code 2); the message says why."""


@dataclass
class Tolerances:
    score_rel: float = 1e-4
    spearman_min: float = 0.999
    sample_agreement_min: float = 0.995
    event_match_hops: int = 3
    teacher_spearman_min: float = 0.95

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


# ---------------------------------------------------------------------------------------------
# the gateway path


def gateway_csv(data: Path, time_col: str, channels: Sequence[str], workdir: Path) -> Path:
    """DATA as the gateway reads it (comma CSV, header, one row per sample, rows in file order).
    A comma CSV is passed as is; other delimiters or Parquet are rewritten row for row."""
    data = Path(data)
    if data.suffix.lower() == ".csv":
        with open(data, encoding="utf-8", errors="replace") as fh:
            header = fh.readline()
        cells = [c.strip().strip('"') for c in header.split(",")]
        if time_col in cells and all(c in cells for c in channels):
            return data
    table = read_table(data, None)
    missing = [c for c in [time_col, *channels] if c not in table.columns]
    if missing:
        raise IntakeError(f"{data}: column(s) {', '.join(missing)} the bundle needs are absent")
    out = Path(workdir) / "gateway_input.csv"
    table[[time_col, *channels]].to_csv(out, index=False)
    return out


def run_gateway(bundle_dir: Path, data: Path, scores_out: Path, backend: str = "numpy") -> Path:
    """Spawn the bundle's own run.py on DATA; returns its scores CSV."""
    cmd = [sys.executable, str(Path(bundle_dir) / "run.py"), "stream", "--input", str(data),
           "--scores-out", str(scores_out), "--backend", backend, "--score-every", "0",
           "--heartbeat", "0", "--checkpoint-every", "0"]
    proc = subprocess.run(cmd, capture_output=True, text=True)
    if proc.returncode != 0:
        last = (proc.stderr.strip().splitlines() or ["(no message)"])[-1]
        raise UnusableInput(f"run.py stream exited with {proc.returncode}: {last}")
    return Path(scores_out)


def read_scores(path: Path) -> pd.DataFrame:
    """A scores CSV (time,score,threshold,alert) with times as naive UTC datetimes."""
    path = Path(path)
    if not path.is_file():
        raise UnusableInput(f"{path}: no such scores file")
    try:
        df = pd.read_csv(path)
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        raise UnusableInput(f"{path}: not a scores CSV ({exc})") from None
    need = ["time", "score", "threshold", "alert"]
    if [c for c in need if c not in df.columns]:
        raise UnusableInput(f"{path}: expected columns {','.join(need)}, found "
                            f"{','.join(map(str, df.columns))}")
    if len(df) == 0:
        raise UnusableInput(f"{path}: no scored hops")
    times = parse_times(df["time"].astype(str))
    if times.isna().any():
        raise UnusableInput(f"{path}: {int(times.isna().sum())} times cannot be parsed")
    return pd.DataFrame({"time": times.to_numpy(),
                         "score": pd.to_numeric(df["score"], errors="coerce").to_numpy(float),
                         "threshold": pd.to_numeric(df["threshold"],
                                                    errors="coerce").to_numpy(float),
                         "alert": df["alert"].fillna(0).astype(int).to_numpy() > 0})


# ---------------------------------------------------------------------------------------------
# thresholds, alerts, events


def replay_alerts(scores: np.ndarray, policy: dict, alerting: dict):
    """(thresholds, alert_open) per hop: the device's threshold.update then machine.step."""
    thr = make_threshold(dict(policy))
    machine = AlertMachine(int(alerting["warmup_hops"]), int(alerting["min_hops"]),
                           float(alerting["close_ratio"]), int(alerting["cooldown_hops"]))
    levels = np.empty(len(scores))
    open_ = np.zeros(len(scores), bool)
    for k, s in enumerate(np.asarray(scores, float)):
        levels[k] = thr.update(float(s))
        machine.step(float(s), levels[k])
        open_[k] = machine.is_open
    return levels, open_


def alert_events(alert: np.ndarray) -> list:
    """Runs of open alert as half-open (first, end) index pairs."""
    padded = np.concatenate([[False], np.asarray(alert, bool), [False]]).astype(np.int8)
    edges = np.flatnonzero(np.diff(padded))
    return list(zip(edges[0::2].tolist(), edges[1::2].tolist()))


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


def compare(times: np.ndarray, ref: dict, other: dict, usable: np.ndarray, tol: Tolerances,
            strict: bool) -> dict:
    """ref/other: {"score", "alert"} arrays per hop. usable: hops whose windows both sides
    computed from the same samples (score figures use only those)."""
    a, b = np.asarray(ref["score"], float), np.asarray(other["score"], float)
    ok = usable & np.isfinite(a) & np.isfinite(b)
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
    ev_a, ev_b = alert_events(ref["alert"]), alert_events(other["alert"])
    pairs, miss_a, miss_b = match_events(ev_a, ev_b, tol.event_match_hops)
    step = np.timedelta64(1, "s")
    out["events"] = {
        "device": len(ev_a), "other": len(ev_b), "matched": len(pairs),
        "only_device": [str(times[ev_a[i][0]]) for i in miss_a],
        "only_other": [str(times[ev_b[j][0]]) for j in miss_b],
        "agreement": 1.0 if not ev_a and not ev_b else 2 * len(pairs) / (len(ev_a) + len(ev_b)),
        "first_alert_delta_s": [
            {"device": str(times[ev_a[i][0]]),
             "delta_s": float((times[ev_b[j][0]] - times[ev_a[i][0]]) / step)}
            for i, j in pairs],
    }
    checks = {}
    if strict:
        checks["score_rel"] = bool(out["max_rel_error"] <= tol.score_rel)
        checks["spearman"] = bool(out["spearman"] >= tol.spearman_min)
        checks["sample_agreement"] = bool(out["sample_agreement"] >= tol.sample_agreement_min)
        checks["events"] = not miss_a and not miss_b
    else:
        checks["spearman"] = bool(out["spearman"] >= tol.teacher_spearman_min)
    out["checks"] = checks
    out["passed"] = all(checks.values())
    return out


# ---------------------------------------------------------------------------------------------
# the workstation series


def repaired_rows(data: Path, frame: Frame, time_col: str) -> np.ndarray:
    """Grid rows the workstation intake repaired differently from the gateway: repeated
    timestamps (averaged here, later copies rejected there) and rows out of time order
    (sorted here, rejected there)."""
    table = read_table(Path(data), None)
    times = parse_times(table[time_col]).dropna().to_numpy()
    slots = grid_index(frame, times)
    out = np.zeros(len(frame.times), bool)
    uniq, counts = np.unique(times, return_counts=True)
    if (counts > 1).any():
        out[grid_index(frame, uniq[counts > 1])] = True
    late = np.flatnonzero(times[1:] < np.maximum.accumulate(times)[:-1]) + 1
    out[slots[late]] = True
    return out


def hop_windows(series: np.ndarray, rows: np.ndarray, window: int):
    """Windows [N, L, C] ending at each row, and which of them are complete (no NaN)."""
    n, c = len(rows), series.shape[1]
    out = np.zeros((n, window, c), np.float32)
    valid = rows >= window - 1
    for k in np.flatnonzero(valid):
        w = series[rows[k] - window + 1: rows[k] + 1]
        if np.isnan(w).any():
            valid[k] = False
        else:
            out[k] = w
    return out, valid


def network_scores(weights: dict, windows: np.ndarray, valid: np.ndarray) -> np.ndarray:
    scores = np.full(len(windows), np.nan)
    if valid.any():
        _, res = Network(weights).forward(windows[valid])
        scores[valid] = score_from_residuals(res)
    return scores


def onnx_scores(bundle: Bundle, windows: np.ndarray, valid: np.ndarray) -> np.ndarray:
    from ganlet.compile.export import run_onnxruntime

    scores = np.full(len(windows), np.nan)
    if valid.any():
        _, res = run_onnxruntime(bundle.onnx_path, windows[valid])
        scores[valid] = score_from_residuals(np.asarray(res, np.float32))
    return scores


def teacher_scores(model_dir: Path, series: np.ndarray, rows: np.ndarray) -> np.ndarray:
    from ganlet.compile.train import load_model, score_windows

    model = load_model(model_dir)
    windows, valid = hop_windows(series, rows, model.detector.config.window)
    scores = np.full(len(rows), np.nan)
    if valid.any():
        s, _ = score_windows(model.detector, windows[valid])
        scores[valid] = s
    return scores


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
    excluded_hops: int = 0
    device_replay_agreement: float = float("nan")

    @property
    def passed(self) -> bool:
        judged = [p for p in self.pairs.values() if p.get("checks")]
        return bool(judged) and all(p["passed"] for p in judged)

    def to_json(self) -> dict:
        return {"passed": self.passed, "bundle": self.bundle, "data": self.data,
                "device_source": self.device_source, "hops": self.hops,
                "excluded_hops": self.excluded_hops,
                "device_alert_replay_agreement": self.device_replay_agreement,
                "tolerances": asdict(self.tolerances), "pairs": self.pairs, "notes": self.notes,
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
        lines += [f"note: {n}" for n in self.notes]
        lines.append("PASS" if self.passed else "FAIL")
        return "\n".join(lines)


def verify(bundle_dir: Path, data: Path, device_scores: Optional[Path] = None,
           model_dir: Optional[Path] = None, tolerances: Sequence[str] = ()) -> VerifyResult:
    try:
        bundle = load_bundle(bundle_dir)
    except BundleError as exc:
        raise UnusableInput(f"bundle refused: {exc}") from None
    tol = Tolerances.from_manifest(bundle.manifest, tolerances)
    notes = []
    opts = IntakeOptions(time_col=bundle.time_column, channels=bundle.channels,
                         period_s=bundle.period_s, max_fill_periods=bundle.max_gap_periods)
    frame = load_frame(data, opts)

    with tempfile.TemporaryDirectory(prefix="ganlet-verify-") as tmp:
        if device_scores is None:
            feed = gateway_csv(Path(data), bundle.time_column, bundle.channels, Path(tmp))
            scores_csv = run_gateway(bundle.dir, feed, Path(tmp) / "scores.csv")
            source = "workstation run of the bundle's run.py stream (numpy backend)"
            device = read_scores(scores_csv)
        else:
            source = f"device capture {device_scores}"
            device = read_scores(device_scores)

    times = device["time"].to_numpy()
    offset_s = (times - frame.times.values[0]) / np.timedelta64(1, "s")
    rows = np.rint(offset_s / frame.period_s).astype(np.int64)
    inside = (rows >= 0) & (rows < len(frame.times))
    if not inside.any():
        raise UnusableInput("the device's scored hops do not fall inside DATA's time span; "
                            "pass the same data the device read")
    if not inside.all():
        notes.append(f"{int((~inside).sum())} device hops lie outside DATA's span; left out")
        device = device[inside].reset_index(drop=True)
        times, rows = times[inside], rows[inside]
    off_grid = np.abs(frame.times.values[rows] - times) > np.timedelta64(
        int(frame.period_s * 0.5e9), "ns")

    series = bundle.scaled(feature_series(frame.values, bundle.rate))
    windows, valid = hop_windows(series, rows, bundle.window)
    repaired = repaired_rows(Path(data), frame, frame.report.time_col)
    touched = np.array([repaired[max(0, r - bundle.window + 1): r + 1].any() for r in rows])
    usable = valid & ~touched & ~off_grid
    if touched.any():
        notes.append(f"{int(touched.sum())} hops have a window over rows the workstation intake "
                     "repaired (repeated timestamps averaged, out-of-order rows sorted) while "
                     "the gateway rejected them; their scores differ by construction and are "
                     "left out of the score figures (alerts still compared)")
    if off_grid.any():
        notes.append(f"{int(off_grid.sum())} device hops fall between grid points; left out "
                     "of the score figures")
    if (~valid).any():
        notes.append(f"{int((~valid).sum())} device hops have no complete window in DATA "
                     "(gaps); left out of the score figures")

    computed = {}
    try:
        computed["onnxruntime"] = onnx_scores(bundle, windows, valid)
    except ImportError:
        notes.append("onnxruntime is not installed: device vs onnxruntime skipped")
    computed["numpy"] = network_scores(bundle.weights, windows, valid)
    teacher_info = bundle.manifest.get("teacher", {})
    student_file = teacher_info.get("student_weights")
    if student_file and Path(student_file).is_file():
        with np.load(student_file, allow_pickle=False) as npz:
            computed["fp32 student"] = network_scores(dict(npz), windows, valid)
    else:
        notes.append("fp32 student weights not available (manifest teacher.student_weights "
                     f"{student_file!r}): device vs fp32 student skipped")
    tdir = Path(model_dir) if model_dir else (Path(teacher_info["model_dir"])
                                                 if teacher_info.get("model_dir") else None)
    if tdir is not None and (tdir / "model.json").is_file():
        try:
            computed["teacher"] = teacher_scores(tdir, series, rows)
        except ImportError:
            notes.append("torch is not installed: device vs teacher skipped")
    else:
        notes.append(f"teacher model directory not available ({tdir}); pass --model DIR: "
                     "device vs teacher skipped")

    dev = {"score": device["score"].to_numpy(float), "threshold": device["threshold"].to_numpy(),
           "alert": device["alert"].to_numpy(bool)}
    out_series = {"device": dev}
    _, replayed = replay_alerts(dev["score"], bundle.threshold_policy, bundle.alerting)
    replay_agreement = float(np.mean(replayed == dev["alert"]))
    if replay_agreement < 1.0:
        notes.append(f"replaying the device's own scores through the threshold policy and alert "
                     f"machine reproduces its alert column on {replay_agreement:.2%} of hops "
                     "(a restart from a checkpoint mid-stream, or a different runtime, would "
                     "explain a difference)")
    pairs = {}
    for name, scores in computed.items():
        levels, alert = replay_alerts(scores, bundle.threshold_policy, bundle.alerting)
        out_series[name] = {"score": scores, "threshold": levels, "alert": alert}
        pairs[name] = compare(times, dev, out_series[name], usable, tol, strict=name in STRICT)
    return VerifyResult(bundle=str(bundle.dir), data=str(data), device_source=source,
                        times=times, series=out_series, pairs=pairs, tolerances=tol, notes=notes,
                        hops=len(times), excluded_hops=int((~usable).sum()),
                        device_replay_agreement=replay_agreement)


# ---------------------------------------------------------------------------------------------
# the HTML report


def plots(result: VerifyResult) -> list:
    plt = rep.pyplot()
    t = result.times
    figs = []
    names = list(result.series)
    fig, axes = plt.subplots(len(names), 1, figsize=(12, 1.9 * len(names) + 0.6), sharex=True,
                             constrained_layout=True, squeeze=False)
    for k, name in enumerate(names):
        ax = axes[k, 0]
        s = result.series[name]
        ax.plot(t, s["score"], lw=0.7, color=rep.colour(name, k), label=f"{name} score")
        ax.plot(t, s["threshold"], lw=0.9, color="tab:red", ls="--", label="threshold")
        rep.shade_runs(ax, t, s["alert"], "tab:red", 0.18, "alert open")
        rep.positive_log_axis(ax, [s["score"], s["threshold"]])
        ax.set_ylabel(name)
        ax.legend(loc="upper left", fontsize=8, ncol=3)
    axes[0, 0].set_title("score, threshold and open alerts at the device's hops")
    figs.append(("score overlay", rep.figure_png(fig)))

    others = [n for n in names if n != "device"]
    if others:
        fig, axes = plt.subplots(1, len(others), figsize=(3.6 * len(others) + 0.5, 3.8),
                                 constrained_layout=True, squeeze=False)
        dev = result.series["device"]["score"]
        for k, name in enumerate(others):
            ax = axes[0, k]
            o = result.series[name]["score"]
            ok = np.isfinite(dev) & np.isfinite(o)
            ax.scatter(dev[ok], o[ok], s=5, alpha=0.5, color=rep.colour(name, k))
            if ok.any():
                lo = max(min(dev[ok].min(), o[ok].min()), 1e-12)
                hi = max(dev[ok].max(), o[ok].max())
                ax.plot([lo, hi], [lo, hi], color="grey", lw=0.8, ls=":")
                if hi / lo > 10:
                    ax.set_xscale("log")
                    ax.set_yscale("log")
            p = result.pairs[name]
            ax.set_title(f"{name}\nSpearman {rep.fmt(p['spearman'], 6)}", fontsize=9)
            ax.set_xlabel("device score")
            ax.set_ylabel(f"{name} score")
        figs.append(("device vs workstation scatter", rep.figure_png(fig)))

        fig, ax = plt.subplots(figsize=(8, 3.8), constrained_layout=True)
        for k, name in enumerate(others):
            o = result.series[name]["score"]
            ok = np.isfinite(dev) & np.isfinite(o)
            rel = np.abs(o[ok] - dev[ok]) / np.maximum(np.abs(dev[ok]), 1e-12)
            rel = np.log10(np.maximum(rel, 1e-12))
            if len(rel):
                ax.hist(rel, bins=60, histtype="step", lw=1.4, color=rep.colour(name, k),
                        label=name)
        ax.axvline(np.log10(result.tolerances.score_rel), color="tab:red", ls="--",
                   label=f"score_rel tolerance {result.tolerances.score_rel:g}")
        ax.set_xlabel("log10 relative score error against the device (exact matches at -12)")
        ax.set_ylabel("hops")
        ax.set_title("relative score error per hop")
        ax.legend(fontsize=8)
        figs.append(("error histogram", rep.figure_png(fig)))
    return figs


def write_html(result: VerifyResult, path: Path) -> Path:
    headers = ["pair", "hops", "max abs err", "max rel err", "spearman", "alert agreement",
               "events matched", "judged", "result"]
    rows = result.pair_rows()
    classes = ["pass" if p["passed"] else "fail" for p in result.pairs.values()]
    deltas = []
    for name, p in result.pairs.items():
        for d in p["events"]["first_alert_delta_s"]:
            deltas.append([name, d["device"], d["delta_s"]])
        for s in p["events"]["only_device"]:
            deltas.append([name, s, "no matching alert"])
        for s in p["events"]["only_other"]:
            deltas.append([name, f"(only {name}) {s}", "no device alert"])
    tol = asdict(result.tolerances)
    sections = [
        ("Verdict", rep.paragraph(("PASS" if result.passed else "FAIL")
                                  + f": {result.hops} hops; device = {result.device_source}.")),
        ("Pairs", rep.html_table(headers, rows, classes) + rep.paragraph(
            "Pairs sharing the int8 weights (device vs onnxruntime, device vs numpy) are held "
            "to the strict tolerances. The fp32 student and the teacher are different networks: "
            "those pairs are judged by rank correlation only (teacher_spearman_min).", "note")),
        ("Tolerances", rep.html_table(["tolerance", "value"], [[k, v] for k, v in tol.items()])),
        ("Alert events: first-alert time difference (other minus device)",
         rep.html_table(["series", "device alert opened", "difference (s)"], deltas)
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
