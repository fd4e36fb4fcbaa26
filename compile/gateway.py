"""Running a bundle from the workstation: the real gateway path, as a subprocess.

`ganlet verify`, `ganlet evaluate` and `ganlet demo` all judge what the gateway does by running
the bundle's own `run.py stream` on a feed and reading back its scores CSV and events; this
module is the one way they do it.
"""

from __future__ import annotations

import json
import subprocess
import sys
from dataclasses import dataclass, field
from pathlib import Path
from typing import Optional, Sequence

import pandas as pd

from ganlet.compile.data import IntakeError, parse_times, read_table, rows_as_times
from ganlet.runtime.events import ALERT_EVENTS, read_provenance


class UnusableInput(ValueError):
    """The inputs cannot be compared at all (exit code 2); the message says why."""


def gateway_csv(data: Path, time_col: str, channels: Sequence[str], workdir: Path,
                decimal: str = ".", rows_period_s: Optional[float] = None) -> Path:
    """DATA as run_bundle feeds it to the gateway (comma CSV, header, one row per sample, rows in
    file order, numbers with a decimal point: run_bundle says --decimal .). A comma CSV is
    passed as is; other delimiters, a decimal comma or Parquet are rewritten row for row, the
    time cells as they were. rows_period_s: a file without `time_col` is given its rows' times,
    one sample each that far apart, as training gave them (data.rows_as_times)."""
    data = Path(data)
    if data.suffix.lower() == ".csv" and decimal == ".":
        with open(data, encoding="utf-8", errors="replace") as fh:
            header = fh.readline()
        cells = [c.strip().strip('"') for c in header.split(",")]
        if time_col in cells and all(c in cells for c in channels):
            return data
    table = read_table(data, None, decimal)
    if rows_period_s is not None and time_col not in table.columns:
        table = rows_as_times(table, rows_period_s)
    missing = [c for c in [time_col, *channels] if c not in table.columns]
    if missing:
        raise IntakeError(f"{data}: column(s) {', '.join(missing)} the bundle needs are absent")
    out = Path(workdir) / "gateway_input.csv"
    table[[time_col, *channels]].to_csv(out, index=False)
    return out


@dataclass
class GatewayRun:
    scores: Path                 # time,score,threshold,alert per hop
    events: list                 # every JSON Lines event printed
    alerts: list = field(default_factory=list)   # the last event of each alert id

    @property
    def stop(self) -> dict:
        return next((e for e in reversed(self.events) if e["event"] == "stop"), {})


def run_bundle(bundle_dir: Path, feed: Path, out_dir: Path, backend: str = "numpy",
               keep_state: bool = False) -> GatewayRun:
    """`run.py stream` of the bundle on a CSV feed; scores, events (and with keep_state a
    checkpoint and an alert database) land in out_dir. The feed is recorded history (--replay:
    not judged against the gateway's clock or the bundle's creation date)."""
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    scores = out_dir / "scores.csv"
    extra = []
    if keep_state:
        extra = ["--state", str(out_dir / "state.json"),
                 "--alert-db", str(out_dir / "alerts.sqlite")]
    for stale in (scores, out_dir / "state.json", out_dir / "alerts.sqlite"):
        stale.unlink(missing_ok=True)
    cmd = [sys.executable, str(Path(bundle_dir) / "run.py"), "stream", "--input", str(feed),
           "--scores-out", str(scores), "--backend", backend, "--score-every", "0",
           "--heartbeat", "0", "--checkpoint-every", "0", "--skip-signature", "--replay",
           "--decimal", ".", *extra]
    proc = subprocess.run(cmd, capture_output=True, text=True)
    (out_dir / "events.jsonl").write_text(proc.stdout)
    if proc.returncode != 0:
        last = (proc.stderr.strip().splitlines() or ["(no message)"])[-1]
        raise UnusableInput(f"run.py stream exited with {proc.returncode}: {last}")
    events = [json.loads(line) for line in proc.stdout.splitlines() if line.strip()]
    alerts = {e["alert_id"]: e for e in events if e["event"] in ALERT_EVENTS}
    return GatewayRun(scores, events, list(alerts.values()))


def read_scores(path: Path) -> pd.DataFrame:
    """A scores CSV (time,score,threshold,alert) with times as naive UTC datetimes; the `# key:
    value` lines at its top (runtime/events.py) in .attrs["provenance"] ({} for a file
    without them)."""
    path = Path(path)
    if not path.is_file():
        raise UnusableInput(f"{path}: no such scores file")
    with open(path, "rb") as fh:
        provenance = read_provenance(fh)
    try:
        df = pd.read_csv(path, comment="#")
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
    out = pd.DataFrame({"time": times.to_numpy(),
                        "score": pd.to_numeric(df["score"], errors="coerce").to_numpy(float),
                        "threshold": pd.to_numeric(df["threshold"],
                                                   errors="coerce").to_numpy(float),
                        "alert": df["alert"].fillna(0).astype(int).to_numpy() > 0})
    out.attrs["provenance"] = provenance
    return out


def check_scores_bundle(scores: pd.DataFrame, bundle_id: str, bundle_name: str = "") -> None:
    """Refuse a scores file that says it comes from another bundle (UnusableInput)."""
    theirs = scores.attrs.get("provenance", {})
    if theirs.get("bundle_id") and theirs["bundle_id"] != bundle_id:
        their_name = f" ({theirs['bundle_name']})" if theirs.get("bundle_name") else ""
        our_name = f" ({bundle_name})" if bundle_name else ""
        raise UnusableInput(f"scores are from bundle {theirs['bundle_id'][:12]}{their_name}, "
                            f"not {bundle_id[:12]}{our_name}")
