"""The streaming loop: input lines -> samples -> one score per hop -> thresholds -> alerts -> events.

Reading order of this file: Detector (the per-sample state machine, no I/O of its own) then
run_stream (files, signals, timers, checkpoints).

Per sample (Detector.feed):
  - t == last time -> rejected "duplicate_time"; t < last time -> rejected "out_of_order";
  - m missing periods with m <= max_gap_periods -> the m samples are filled by linear
    interpolation in raw units; more -> the window is reset, a "gap" event is emitted and
    scoring waits until the ring is full again;
  - each channel's feature (its level, or its rate: features.py; a rate needs the row before,
    so after a start or a gap the first row only primes it), scaled (f - center) / scale into
    the ring; every `hop` new samples once the ring is full,
    exactly one window is scored: threshold = thr.update(score); transition = machine.step(...).

Crash safety (why the order is what it is): on a hop that changes an alert the service emits
the score row (CSV sink, buffered), then the alert event (SQLite commit first, then stdout),
and only THEN writes a checkpoint, which first fsyncs the CSV and records its byte size.
  - crash before the checkpoint: the restart resumes from the previous checkpoint, cuts the CSV
    back to the size recorded there and replays the input from the checkpoint's last time. The
    replay derives the same transition with the same deterministic alert id, and the SQLite
    upsert by id rewrites the same row: nothing is lost, nothing duplicated.
  - a checkpoint written BEFORE the commit would be worse: a crash between the two would leave
    a state that believes the alert is open while the database never heard of it, and the
    replay would not re-derive it (the transition is already behind the checkpoint).
  - stdout events are at-least-once: after a crash the replayed hops print their events again;
    consumers de-duplicate alerts by alert_id (scores by time).
The replay needs input that can be read again (a file, or a source that re-sends unacknowledged
rows); rows read from a pipe after the last checkpoint are gone with the process.
"""

import hashlib
import signal
import sys
import time
from collections import deque
from typing import Dict, List, Optional

import numpy as np

from . import features
from .alerts import CLOSED, OPENED, WARMED_UP, AlertMachine
from .checkpoint import CheckpointError, load_checkpoint, save_checkpoint
from .events import AlertDbSink, EventWriter, JsonLinesSink, ScoresCsvSink
from .intake import (
    MAX_LINE_BYTES,
    REJECT_KINDS,
    Header,
    HeaderError,
    RowError,
    decode_line,
    format_time,
)
from .ring import Ring
from .thresholds import make_threshold, threshold_from_state

ADVISORY_NOTICE = (
    "ganlet detection is advisory condition monitoring. It is not a safety function and does "
    "not replace trips, interlocks or protection devices; local codes and licensed practice "
    "govern the installation."
)
# A scaled value this far out is a broken sensor or a unit error, not a measurement; the
# limit also keeps the squared residual far from float32 overflow (~3.4e38).
MAX_SCALED_ABS = 1e6
TOP_CHANNELS = 3  # channels reported per alert
ERROR_REPORT_INTERVAL_S = 5.0  # input_error events at most this often (first one at once)
POLL_S = 0.2  # --follow: wait between reads at end of file
COUNTERS = (
    "lines",  # data lines read (after the header)
    "blank_lines",
    "samples",  # accepted input rows
    "interpolated",  # samples filled in across short gaps
    "gaps",  # long gaps that reset the window
    "hops",  # windows scored
    "alerts_opened",
    "alerts_closed",
)


def _finite_or_none(x) -> Optional[float]:
    x = float(x)
    return x if np.isfinite(x) else None


def alert_id(bundle_id: str, opened: str) -> str:
    """Deterministic: the same bundle and the same start time give the same id on replay."""
    return hashlib.sha256(f"{bundle_id}|{opened}".encode("ascii")).hexdigest()[:20]


class Detector:
    """Per-sample state: ring, hop counters, threshold, alert machine, open alert, counters."""

    def __init__(self, bundle, scorer, writer: EventWriter):
        self.bundle = bundle
        self.scorer = scorer
        self.writer = writer
        self.ring = Ring(bundle.window, len(bundle.channels))
        self.threshold = make_threshold(bundle.threshold_policy)
        a = bundle.alerting
        self.machine = AlertMachine(
            int(a["warmup_hops"]), int(a["min_hops"]), float(a["close_ratio"]),
            int(a["cooldown_hops"]),
        )
        self.counters = {k: 0 for k in COUNTERS}
        self.errors = {k: 0 for k in REJECT_KINDS}
        self.last_time = None  # type: Optional[float]
        self.last_raw = None  # type: Optional[np.ndarray]  # raw row at last_time
        self.last_scored_time = None  # type: Optional[float]
        # the last min_hops hops: an alert opens at the first of them (open_since_hop)
        self.recent = deque(maxlen=self.machine.min_hops)  # (hop, time, residuals)
        self.alert = None  # type: Optional[dict]
        # set on an alert change; run_stream checkpoints once the whole row is processed, so a
        # checkpoint never holds half a row (ring updated but last_time not yet)
        self.alert_changed = False

    # ------------------------------------------------------------------ state
    def state(self) -> dict:
        return {
            "ring": self.ring.state(),
            "threshold": self.threshold.state(),
            "machine": self.machine.state(),
            "counters": dict(self.counters),
            "errors": dict(self.errors),
            "last_time": self.last_time,
            "last_raw": None if self.last_raw is None else [float(v) for v in self.last_raw],
            "last_scored_time": self.last_scored_time,
            "recent": [[h, t, [float(v) for v in r]] for h, t, r in self.recent],
            "alert": self.alert,
        }

    def restore(self, d: dict) -> None:
        self.ring = Ring.from_state(d["ring"])
        self.threshold = threshold_from_state(d["threshold"])
        self.machine = AlertMachine.from_state(d["machine"])
        self.counters.update(d["counters"])
        self.errors.update(d["errors"])
        self.last_time = d["last_time"]
        self.last_raw = None if d["last_raw"] is None else np.asarray(d["last_raw"], np.float64)
        self.last_scored_time = d["last_scored_time"]
        self.recent = deque(
            ((int(h), float(t), np.asarray(r, dtype=np.float64)) for h, t, r in d["recent"]),
            maxlen=self.machine.min_hops,
        )
        self.alert = d["alert"]

    # ------------------------------------------------------------------ samples
    def feed(self, t: float, values: List[float]) -> None:
        """One validated row. Raises RowError for time order problems (nothing changes then)."""
        if self.last_time is not None:
            if t == self.last_time:
                raise RowError("duplicate_time", f"time {format_time(t)} seen already")
            if t < self.last_time:
                raise RowError(
                    "out_of_order", f"time {format_time(t)} before {format_time(self.last_time)}"
                )
        raw = np.asarray(values, dtype=np.float64)
        previous = self.last_raw
        grid = [(t, raw)]  # the grid rows this sample stands for: filled-in ones, then itself
        gap = 0
        if self.last_time is not None:
            steps = max(1, int(round((t - self.last_time) / self.bundle.period_s)))
            missing = steps - 1
            if 0 < missing <= self.bundle.max_gap_periods:
                # linear in raw units, as the workstation's intake fills short gaps
                grid = [
                    (self.last_time + (t - self.last_time) * k / steps,
                     previous + (raw - previous) * (k / steps))
                    for k in range(1, steps)
                ] + grid
            elif missing > self.bundle.max_gap_periods:
                gap = missing
                previous = None
        rows = []  # (time, scaled features or None while a rate channel has no previous row)
        for tk, r in grid:
            f = features.row(r, previous, self.bundle.rate)
            previous = r
            known = ~np.isnan(f)
            x = self.bundle.scaled(f)
            if not (np.abs(x[known]) <= MAX_SCALED_ABS).all():  # also float32 overflow (inf)
                raise RowError(
                    "out_of_range",
                    f"a value is more than {MAX_SCALED_ABS:g} scale units from center",
                )
            rows.append((tk, x if known.all() else None))
        # the row is accepted: from here on the state changes
        self.counters["samples"] += 1
        if gap:
            self.counters["gaps"] += 1
            self.writer.emit(
                "gap", start=format_time(self.last_time), end=format_time(t),
                missing_periods=gap, max_gap_periods=self.bundle.max_gap_periods,
                action="window_reset",
                samples_to_refill=self.bundle.window + int(self.bundle.rate.any()),
            )
            self.ring.reset()
            self.recent.clear()
        self.counters["interpolated"] += len(rows) - 1
        for tk, x in rows:
            if x is not None:
                self._push(x, tk)
        self.last_raw = raw
        self.last_time = t

    def _push(self, row: np.ndarray, t: float) -> None:
        self.ring.push(row)
        extra = self.ring.filled - self.ring.size
        if extra >= 0 and extra % self.bundle.hop == 0:
            self._score(t)

    # ------------------------------------------------------------------ one hop
    def _score(self, t: float) -> None:
        scores, residuals = self.scorer.score_windows(self.ring.window()[None])
        score = float(scores[0])
        res = np.asarray(residuals[0], dtype=np.float64)
        threshold = float(self.threshold.update(score))
        hop = self.machine.hop
        transition = self.machine.step(score, threshold)
        self.counters["hops"] += 1
        self.last_scored_time = t
        self.recent.append((hop, t, res))
        if self.alert is not None:  # an open alert (its closing hop included) collects residuals
            self._add_residual(res)
        self.writer.emit(
            "score", time=format_time(t), hop=hop, score=_finite_or_none(score),
            threshold=_finite_or_none(threshold), alert_open=self.machine.is_open,
        )
        if transition == WARMED_UP:
            self.writer.emit("warmed_up", time=format_time(t), hop=hop)
        elif transition == OPENED:
            self._open(threshold)
        elif transition == CLOSED:
            self._close(t, hop)

    def _add_residual(self, res: np.ndarray) -> None:
        self.alert["residual_sum"] = [a + float(b) for a, b in zip(self.alert["residual_sum"], res)]
        self.alert["hops"] += 1

    def _channels(self) -> List[Dict]:
        total = float(sum(self.alert["residual_sum"]))
        shares = [v / total if total > 0 else 0.0 for v in self.alert["residual_sum"]]
        order = sorted(range(len(shares)), key=lambda i: (-shares[i], i))[:TOP_CHANNELS]
        return [
            {"name": self.bundle.channels[i], "unit": self.bundle.units[i],
             "share": round(shares[i], 6)}
            for i in order
        ]

    def _open(self, threshold: float) -> None:
        since = self.machine.open_since_hop
        run = [(h, t, r) for h, t, r in self.recent if h >= since]
        opened_t = run[0][1]
        opened = format_time(opened_t)
        self.alert = {
            "alert_id": alert_id(self.bundle.bundle_id, opened),
            "opened": opened,
            "opened_hop": since,
            "threshold": threshold,
            "residual_sum": [0.0] * len(self.bundle.channels),
            "hops": 0,
        }
        for _, _, r in run:
            self._add_residual(r)
        self.counters["alerts_opened"] += 1
        self._emit_alert("alert_opened", closed=None)

    def _close(self, t: float, hop: int) -> None:
        self.counters["alerts_closed"] += 1
        self._emit_alert("alert_closed", closed=format_time(t))
        self.alert = None

    def _emit_alert(self, name: str, closed: Optional[str]) -> None:
        a = self.alert
        self.writer.emit(
            name, alert_id=a["alert_id"], bundle_id=self.bundle.bundle_id, opened=a["opened"],
            closed=closed, peak_score=_finite_or_none(self.machine.peak_score),
            threshold=_finite_or_none(a["threshold"]), hops=a["hops"],
            channels=self._channels(),
        )
        self.alert_changed = True


# ---------------------------------------------------------------------- reading lines
class _Stop(Exception):
    """Raised from the signal handler while the loop is blocked reading input."""


class _Reader:
    """Lines of a binary stream, each at most MAX_LINE_BYTES; longer ones come back as None.

    With follow=True, end of file means "wait for more": idle() is called between polls and a
    partial last line is kept until its newline arrives.
    """

    TOO_LONG = object()

    def __init__(self, fh, follow: bool, idle, control):
        self.fh = fh
        self.follow = follow
        self.idle = idle
        self.control = control

    def _read(self) -> bytes:
        self.control.in_read = True
        try:
            if self.control.stop_signal is not None:
                raise _Stop()
            return self.fh.readline(MAX_LINE_BYTES + 2)
        finally:
            self.control.in_read = False

    def __iter__(self):
        pending = b""
        too_long = False
        while True:
            chunk = self._read()
            if not chunk:
                if self.follow:
                    self.idle()
                    time.sleep(POLL_S)
                    continue
                if pending or too_long:
                    yield self.TOO_LONG if too_long else pending
                return
            pending += chunk
            if len(pending) > MAX_LINE_BYTES + 1:
                too_long = True
                pending = b""
            if chunk.endswith(b"\n"):
                if too_long:
                    yield self.TOO_LONG
                else:
                    yield pending[:-1]
                pending = b""
                too_long = False


class _Control:
    def __init__(self):
        self.stop_signal = None  # type: Optional[int]
        self.in_read = False

    def handler(self, signum, frame):
        self.stop_signal = signum
        if self.in_read:
            raise _Stop()


# ---------------------------------------------------------------------- the service
class StreamOptions:
    def __init__(
        self,
        input: str = "-",
        follow: bool = False,
        state: Optional[str] = None,
        scores_out: Optional[str] = None,
        alert_db: Optional[str] = None,
        score_every: int = 1,
        checkpoint_every: float = 30.0,
        heartbeat: float = 60.0,
    ):
        self.input = input
        self.follow = follow
        self.state = state
        self.scores_out = scores_out
        self.alert_db = alert_db
        self.score_every = score_every
        self.checkpoint_every = checkpoint_every
        self.heartbeat = heartbeat


def run_stream(bundle, scorer, opts: StreamOptions, stdout=None, stderr=None, stdin=None) -> int:
    """Run until end of input (or a signal). Returns the process exit code."""
    stdout = stdout or sys.stdout
    stderr = stderr or sys.stderr
    stderr.write("NOTICE: " + ADVISORY_NOTICE + "\n")
    stderr.flush()

    saved = load_checkpoint(opts.state, bundle.bundle_id) if opts.state else None
    sinks = []
    if opts.alert_db:
        sinks.append(AlertDbSink(opts.alert_db))
    scores_sink = None
    if opts.scores_out:
        offset = saved.get("scores_offset") if saved else None
        scores_sink = ScoresCsvSink(opts.scores_out, resume_offset=offset)
        sinks.append(scores_sink)
    sinks.append(JsonLinesSink(stdout, opts.score_every))
    writer = EventWriter(sinks)
    det = Detector(bundle, scorer, writer)
    if saved:
        try:
            det.restore(saved["detector"])
        except (KeyError, TypeError, ValueError) as exc:
            writer.close()
            raise CheckpointError(
                f"{opts.state}: state cannot be restored ({exc}); move it aside to start fresh"
            ) from None
    resume_after = det.last_time if saved else None

    def checkpoint() -> None:
        if not opts.state:
            return
        state = {"detector": det.state()}
        state["scores_offset"] = scores_sink.durable_offset() if scores_sink else None
        save_checkpoint(opts.state, bundle.bundle_id, state)

    if opts.state and not saved:
        checkpoint()  # so a crash before the first timed checkpoint still resumes cleanly

    control = _Control()
    old_handlers = {}
    for sig in (signal.SIGTERM, signal.SIGINT):
        try:
            old_handlers[sig] = signal.signal(sig, control.handler)
        except ValueError:  # not the main thread: no signal handling
            pass

    started = time.monotonic()
    timers = {"checkpoint": started, "heartbeat": started, "errors": None}
    pending_errors = {}  # kind -> count since the last input_error event
    example = {}

    def report_errors(force: bool) -> None:
        if not pending_errors:
            return
        now = time.monotonic()
        last = timers["errors"]
        if not force and last is not None and now - last < ERROR_REPORT_INTERVAL_S:
            return
        writer.emit(
            "input_error", counts=dict(pending_errors),
            totals={k: v for k, v in det.errors.items() if v}, example=dict(example),
        )
        pending_errors.clear()
        example.clear()
        timers["errors"] = now

    def reject(kind: str, lineno: int, detail: str) -> None:
        det.errors[kind] += 1
        pending_errors[kind] = pending_errors.get(kind, 0) + 1
        if not example:
            example.update({"line": lineno, "kind": kind, "detail": detail})
        report_errors(force=False)

    def timed() -> None:
        now = time.monotonic()
        if opts.heartbeat and now - timers["heartbeat"] >= opts.heartbeat:
            timers["heartbeat"] = now
            writer.emit(
                "heartbeat", uptime_s=round(now - started, 3),
                last_time=format_time(det.last_time) if det.last_time is not None else None,
                counters=dict(det.counters),
            )
        if opts.checkpoint_every and now - timers["checkpoint"] >= opts.checkpoint_every:
            timers["checkpoint"] = now
            checkpoint()
        report_errors(force=False)

    writer.emit(
        "start", bundle_id=bundle.bundle_id, name=bundle.manifest["name"],
        tool_version=bundle.manifest["tool_version"], backend=scorer.name,
        channels=list(bundle.channels), window=bundle.window, hop=bundle.hop,
        period_s=bundle.period_s, threshold=bundle.threshold_policy.get("kind"),
        resumed=bool(saved),
        resume_after=format_time(resume_after) if resume_after is not None else None,
        notice=ADVISORY_NOTICE,
    )

    own_input = opts.input != "-"
    fh = open(opts.input, "rb") if own_input else (stdin or sys.stdin.buffer)
    reason, code, already = "end_of_input", 0, 0
    header = None
    lineno = 0
    try:
        for raw in _Reader(fh, opts.follow, timed, control):
            lineno += 1
            if control.stop_signal is not None:
                break
            try:
                if raw is _Reader.TOO_LONG:
                    raise RowError("too_long", f"line longer than {MAX_LINE_BYTES} bytes")
                text = decode_line(raw)
            except RowError as exc:
                if header is None:
                    raise HeaderError(f"line {lineno}: header unreadable ({exc})") from None
                if resume_after is not None:
                    already += 1
                    continue
                det.counters["lines"] += 1
                reject(exc.kind, lineno, exc.detail)
                continue
            if header is None:
                if text is None:
                    continue
                header = Header(text, bundle.time_column, bundle.channels)
                continue
            if resume_after is not None:
                # Replay prefix after a restart: every line up to the first one whose time is
                # later than the checkpoint was handled before; skip it quietly. (A bad line
                # with no readable time in this prefix is counted here too: it cannot be
                # told apart from one the previous run already counted.)
                t = header.time_of(text) if text is not None else None
                if t is None or t <= resume_after:
                    already += 1
                    continue
                resume_after = None
            det.counters["lines"] += 1
            if text is None:
                det.counters["blank_lines"] += 1
                continue
            try:
                t, values = header.parse(text)
                det.feed(t, values)
            except RowError as exc:
                reject(exc.kind, lineno, exc.detail)
            if det.alert_changed:
                det.alert_changed = False
                checkpoint()
            timed()
        if control.stop_signal is not None:
            reason = "signal"
    except _Stop:
        reason = "signal"
    except HeaderError as exc:
        reason, code = "bad_header", 2
        stderr.write(f"error: {exc}\n")
    finally:
        if own_input:
            fh.close()
        for sig, old in old_handlers.items():
            signal.signal(sig, old)

    report_errors(force=True)
    checkpoint()
    fields = {
        "reason": reason,
        "last_time": format_time(det.last_time) if det.last_time is not None else None,
        "counters": dict(det.counters),
        "errors": dict(det.errors),
        "already_processed": already,
        "open_alert": det.alert["alert_id"] if det.alert else None,
    }
    if control.stop_signal is not None:
        fields["signal"] = signal.Signals(control.stop_signal).name
    writer.emit("stop", **fields)
    writer.close()
    return code
