"""The gateway service: input -> Detector -> events -> sinks, with signals and checkpoints.

The detector itself (detector.py) has no I/O; this file owns the input (sources.py), the sinks
(events.py), the timers (heartbeat, checkpoint, rate-limited input_error reports), signals and
the checkpoint file (checkpoint.py).

Crash safety (why the order is what it is): on a row that changes an alert the service hands
the events to the sinks in order: the score row (CSV sink, buffered), then the alert event
(SQLite commit first, then stdout), and only THEN writes a checkpoint, which first makes every
sink durable (fsyncs the CSV and records its byte size).
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
rows: MQTT, see mqtt.py); rows read from a pipe after the last checkpoint are gone with the
process. After each checkpoint the after_checkpoint hooks run: the MQTT source acknowledges
there, so the broker forgets a sample only once a checkpoint covers it.

Where a restart resumes: the checkpoint records the input position after the last line whose
fate is decided (sources.Position: byte offset, the bytes before it, the header in force). When
the same file still holds those bytes there, the restart continues exactly after them, whatever
the times in the file do (a clock set back included). Otherwise (standard input, a rotated file)
it skips every line up to the first one later than the checkpoint's last time. Rows the clock
guard (clock.py) holds are not decided: the position stays before them, so they are read again
after a restart and never reach the checkpoint unconfirmed.
"""

import math
import signal
import sys
import time
from typing import Optional

import numpy as np

from .alerts import BY_HELD, OPENED_BY
from .checkpoint import CheckpointError, load_checkpoint, save_checkpoint
from .clock import BACKLOG_DAYS, CONFIRM_ROWS, FEED, JUMP, MAX_AHEAD_S, ClockBounds, Timeline
from .detector import Detector
from .events import (
    ALERT_EVENTS,
    AlertDbSink,
    EventWriter,
    JsonLinesSink,
    ScoresCsvSink,
    refuse_other_bundle,
    scores_provenance,
)
from .guard import STORE_ERRORS
from .intake import REJECT_KINDS, Dialect, HeaderError, NoTimeColumn, RowError, format_time
from .manifest import times_from_rows
from .sources import Control, CsvSource, Position, Stop, open_input
from .times import MAX_TIME, MIN_TIME, TimeError, parse_time

ADVISORY_NOTICE = (
    "ganlet detection is advisory condition monitoring. It is not a safety function and does "
    "not replace trips, interlocks or protection devices; local codes and licensed practice "
    "govern the installation."
)
ERROR_REPORT_INTERVAL_S = 5.0  # input_error events at most this often (first one at once)
EXIT_NO_ROWS = 5  # the input held no usable data row: empty, header only, or every row refused


def wall_clock() -> float:
    """The gateway's clock (epoch seconds): read here, never by the detector."""
    return time.time()


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
        scores_max_bytes: Optional[int] = None,
        dialect: Optional[Dialect] = None,
        replay: bool = False,
        max_ahead: float = MAX_AHEAD_S,
        backlog_days: float = BACKLOG_DAYS,
        confirm_rows: int = CONFIRM_ROWS,
        mqtt=None,
    ):
        self.input = input
        self.dialect = dialect  # None: UTC, separator from the header
        self.replay = replay  # recorded history: no gateway-clock or bundle-date bounds
        self.max_ahead = max_ahead
        self.backlog_days = backlog_days
        self.confirm_rows = confirm_rows
        self.follow = follow
        self.state = state
        self.scores_out = scores_out
        self.alert_db = alert_db
        self.score_every = score_every
        self.checkpoint_every = checkpoint_every
        self.heartbeat = heartbeat
        self.scores_max_bytes = scores_max_bytes
        self.mqtt = mqtt  # mqtt.MqttSettings when --mqtt-in / --mqtt-out is given


class _Timers:
    """Heartbeat, checkpoint and input_error report clocks (monotonic seconds)."""

    def __init__(self, now: float):
        self.started = now
        self.heartbeat = now
        self.checkpoint = now
        self.errors = None  # type: Optional[float]


class Service:
    """One run of `run.py stream`: sinks, detector, checkpoint, the read loop."""

    def __init__(self, bundle, scorer, opts: StreamOptions, stdout, stderr, link=None):
        self.bundle = bundle
        self.opts = opts
        self.stderr = stderr
        self.link = link  # the MQTT connection (mqtt.MqttLink), or None
        self.after_checkpoint = []  # called once each checkpoint is durable
        saved = load_checkpoint(opts.state, bundle.bundle_id) if opts.state else None
        saved = _checked_saved(saved, opts.state)
        self.writer = EventWriter.guarded(self._sinks(stdout, scorer.name),
                                          (saved or {}).get("sinks", {}), notice=stderr)
        self.checkpoint_failed = False
        self.det = Detector(bundle, scorer)
        self.det.errors.update({k: 0 for k in REJECT_KINDS})
        self.det.counters.setdefault("header_lines", 0)
        self.resume_pos = None  # type: Optional[Position]
        if saved:
            self._restore(saved)
        self.resumed = bool(saved)
        self.resume_after = self.det.last_time if saved else None
        self.timers = _Timers(time.monotonic())
        self.pending_errors = {}  # kind -> count since the last input_error event
        self.example = {}
        self.already = 0  # lines of the replay prefix after a restart
        self.bounds = _clock_bounds(bundle, opts)
        self.timeline = Timeline(bundle.period_s, bundle.max_gap_periods, opts.confirm_rows)
        self.position = self.resume_pos  # after the last line whose fate is decided
        self.held_from = None  # type: Optional[Position]  # before the first held row
        self.clock_suspect = False
        self.run_rows = self.run_fed = 0  # data lines read / rows fed in this run
        self.first_refusal = None  # type: Optional[str]
        if opts.state and not saved:
            self.checkpoint()  # so a crash before the first timed checkpoint resumes cleanly

    def _restore(self, saved: dict) -> None:
        try:
            with np.errstate(all="ignore"):  # absurd numbers are refused below, not warned of
                self.det.restore(saved["detector"])
            _check_restored(self.det, self.bundle)
            if saved.get("input") is not None:
                self.resume_pos = Position.from_state(saved["input"])
        except Exception as exc:  # noqa: BLE001 - decoding untrusted state: every failure is "unusable"
            self.writer.close()
            raise CheckpointError(
                f"{self.opts.state}: state cannot be restored ({type(exc).__name__}: {exc}); "
                "move it aside to start fresh"
            ) from None

    def _sinks(self, stdout, backend: str) -> list:
        """(sink class, open(resume) -> sink), durable sinks first; each is guarded."""
        opts, sinks = self.opts, []
        if opts.alert_db:
            sinks.append((AlertDbSink, lambda _resume: AlertDbSink(opts.alert_db)))
        if opts.scores_out:
            provenance = scores_provenance(self.bundle, backend)
            refuse_other_bundle(opts.scores_out, provenance)
            sinks.append((ScoresCsvSink, lambda resume: ScoresCsvSink(
                opts.scores_out, resume=resume, max_bytes=opts.scores_max_bytes,
                provenance=provenance)))
        if self.link is not None and opts.mqtt.publish:
            from .mqtt import MqttSink

            sinks.append((MqttSink, lambda resume: MqttSink(self.link, resume=resume)))
        stdout_sink = JsonLinesSink(stdout, opts.score_every)
        sinks.append((JsonLinesSink, lambda _resume: stdout_sink))
        return sinks

    def emit(self, event_name: str, /, **fields) -> None:
        self.writer.emit(dict(event=event_name, **fields))

    def checkpoint(self) -> None:
        """Make the sinks durable (a full scores file rotates here), then save the state. A
        state file that cannot be written is reported once per streak and retried at the next
        checkpoint: detection goes on, a restart resumes from the last saved one."""
        sinks = self.writer.durable_state()
        if self.opts.state and not self._save_state(sinks):
            return
        for hook in self.after_checkpoint:
            hook()

    def _save_state(self, sinks: dict) -> bool:
        mark = self.held_from or self.position
        try:
            save_checkpoint(self.opts.state, self.bundle.bundle_id,
                            {"detector": self.det.state(), "sinks": sinks,
                             "input": mark.state() if mark is not None else None})
        except STORE_ERRORS as exc:
            if not self.checkpoint_failed:
                self.stderr.write(f"sink_error: checkpoint {self.opts.state}: {exc}\n")
                self.emit("sink_error", sink="checkpoint", error=f"{type(exc).__name__}: {exc}",
                          retry_in_s=self.opts.checkpoint_every or None, failures=1)
            self.checkpoint_failed = True
            return False
        if self.checkpoint_failed:
            self.checkpoint_failed = False
            self.emit("sink_recovered", sink="checkpoint", down_s=None, missed=0, replayed=0)
        return True

    # ------------------------------------------------------------------ per record
    def handle(self, rec) -> None:
        if rec.event is not None and rec.header is None:  # about the input itself
            self.writer.emit(rec.event)
        elif rec.header is not None:
            self._header(rec)
        elif not self._already(rec):
            self._line(rec)
        self._advance(rec)

    def _already(self, rec) -> bool:
        if self.resume_after is None:
            return False
        # Replay prefix after a restart that could not resume by position: every line up to
        # the first one whose time is later than the checkpoint was handled before; skip it
        # quietly. (A bad line with no readable time in this prefix is counted here too: it
        # cannot be told apart from one the previous run already counted.)
        if rec.time is None or rec.time <= self.resume_after:
            self.already += 1
            return True
        self.resume_after = None
        return False

    def _header(self, rec) -> None:
        if rec.header == "first" or self.resume_after is not None:
            return
        self.det.counters["lines"] += 1
        self.det.counters["header_lines"] += 1
        if rec.event is not None:
            self.writer.emit(rec.event)

    def _line(self, rec) -> None:
        self.det.counters["lines"] += 1
        if rec.blank:
            self.det.counters["blank_lines"] += 1
            return
        self.run_rows += 1
        if rec.error is not None:
            self.reject(rec.error, rec.lineno)
            return
        now = wall_clock()
        self._watch_clock(now)
        problem = self.bounds.check(rec.time, now)
        if problem is not None:
            self.reject(problem, rec.lineno)
            return
        for step in self.timeline.offer(rec.time, rec, self.det.last_time):
            self._step(step)

    def _step(self, step) -> None:
        if step.action == JUMP:
            self._jump(step.jump, step.time)
        elif step.action == FEED:
            self.feed(step.item)
        else:
            self.reject(step.error, step.item.lineno)

    def _advance(self, rec) -> None:
        """Keep the resume position: after this line, or before the first held row."""
        first = self.timeline.first_held()
        if first is None:
            self.held_from = None
        elif first is rec:
            self.held_from = self.position or Position(0, b"", 0, 0, None)
        self.position = rec.pos

    def feed(self, rec) -> None:
        try:
            events = self.det.feed(rec.time, rec.values)
        except RowError as exc:
            self.reject(exc, rec.lineno)
            return
        self.run_fed += 1
        self.det.counters["text_cells"] += rec.text_cells
        for event in events:
            self.writer.emit(event)
        if any(e["event"] in ALERT_EVENTS for e in events) or self.writer.wants_checkpoint():
            if not self.timeline.pending:
                self.position, self.held_from = rec.pos, None  # rows of a confirmed jump
            self.checkpoint()

    def _jump(self, jump: dict, first_time: float) -> None:
        backward = jump["direction"] == "backward"
        what = ("the feed's clock was set back" if backward else
                "a long gap in the feed, or its clock set forward")
        self.emit("time_jump", what=what, direction=jump["direction"],
                  **{"from": format_time(jump["from"])},
                  to=format_time(jump["to"]), shift_s=round(jump["to"] - jump["from"], 3),
                  confirmed_by_rows=jump["rows"],
                  action="clock_restarted" if backward else "window_reset")
        if backward:
            self.det.restart_clock()

    def _watch_clock(self, now: float) -> None:
        suspect = not self.bounds.clock_ok(now)
        if suspect and not self.clock_suspect:
            self.emit("clock_suspect", gateway_clock=format_time(now),
                      earliest_plausible=format_time(self.bounds.earliest),
                      action="rows are not checked against the gateway clock until it is set")
        self.clock_suspect = suspect

    def reject(self, exc: RowError, lineno: int) -> None:
        self.det.errors[exc.kind] = self.det.errors.get(exc.kind, 0) + 1
        self.pending_errors[exc.kind] = self.pending_errors.get(exc.kind, 0) + 1
        if self.first_refusal is None:
            self.first_refusal = f"line {lineno}: {exc.kind}: {exc.detail}"
        if not self.example:
            self.example.update({"line": lineno, "kind": exc.kind, "detail": exc.detail})
        self.report_errors(force=False)

    def report_errors(self, force: bool) -> None:
        if not self.pending_errors:
            return
        now, last = time.monotonic(), self.timers.errors
        if not force and last is not None and now - last < ERROR_REPORT_INTERVAL_S:
            return
        self.emit("input_error", counts=dict(self.pending_errors),
                  totals={k: v for k, v in self.det.errors.items() if v},
                  example=dict(self.example))
        self.pending_errors.clear()
        self.example.clear()
        self.timers.errors = now

    def timed(self) -> None:
        now, opts, t = time.monotonic(), self.opts, self.timers
        if opts.heartbeat and now - t.heartbeat >= opts.heartbeat:
            t.heartbeat = now
            last = self.det.last_time
            self.emit("heartbeat", uptime_s=round(now - t.started, 3),
                      last_time=format_time(last) if last is not None else None,
                      counters=dict(self.det.counters), channels_lost=self.det.channels_lost())
        if opts.checkpoint_every and now - t.checkpoint >= opts.checkpoint_every:
            t.checkpoint = now
            self.checkpoint()
        self.report_errors(force=False)
        if self.link is not None:
            self.link.flush()  # events held while the broker was away, even if none follow

    # ------------------------------------------------------------------ the run
    def start_event(self) -> None:
        b, d = self.bundle, self.opts.dialect or Dialect()
        self.emit("start", bundle_id=b.bundle_id, name=b.manifest["name"],
                  tool_version=b.manifest["tool_version"], backend=self.det.scorer.name,
                  channels=list(b.channels), window=b.window, hop=b.hop, period_s=b.period_s,
                  threshold=b.threshold_policy.get("kind"), resumed=self.resumed,
                  resume_after=(format_time(self.resume_after)
                                if self.resume_after is not None else None),
                  input={"sep": d.sep, "decimal": d.decimal, "time_zone": d.zone_name,
                         "date_order": d.date_order, "replay": self.opts.replay},
                  notice=ADVISORY_NOTICE)

    def open_source(self, reader, control: Control) -> CsvSource:
        """The CSV source over `reader`, resumed exactly after the checkpoint's position when
        the input still holds it (then the time-based replay prefix is not needed)."""
        source = CsvSource(reader, self.bundle.time_column, self.bundle.channels,
                           self.opts.follow, self.timed, control, dialect=self.opts.dialect)
        if self.resume_pos is not None and source.resume_at(self.resume_pos):
            self.resume_after = None
            self.already = self.resume_pos.rows
            source.last_time = self.det.last_time
        return source

    def run(self, source, control: Control) -> int:
        """Read Records from `source` (sources.py, or mqtt.py) until it ends or a signal stops
        it."""
        reason, code = "end_of_input", 0
        try:
            for rec in source:
                if control.stop_signal is not None:
                    break
                self.handle(rec)
                self.timed()
            if control.stop_signal is not None:
                reason = "signal"
        except Stop:
            reason = "signal"
        except HeaderError as exc:
            reason, code = "bad_header", 2
            self.stderr.write(f"error: {exc}{rows_hint(self.bundle, exc)}\n")
        if reason == "end_of_input":
            for step in self.timeline.flush(self.det.last_time):
                self._step(step)
            code = self._no_rows_code(source)
        self.finish(reason, control)
        return code

    def _no_rows_code(self, source: CsvSource) -> int:
        """EXIT_NO_ROWS (with a message) when this run read nothing usable."""
        if getattr(source, "header_text", "") is None:  # (an MQTT source has no header)
            problem = "the input is empty (no header line)"
        elif self.run_rows == 0 and self.already == 0:
            problem = "the input has a header but no data rows"
        elif self.run_rows > 0 and self.run_fed == 0:
            refused = ", ".join(f"{k} {v}" for k, v in self.det.errors.items() if v)
            problem = (f"all {self.run_rows} data rows were refused ({refused}); first: "
                       f"{self.first_refusal}")
        else:
            return 0
        self.stderr.write(f"error: {problem}\n")
        return EXIT_NO_ROWS

    def finish(self, reason: str, control: Control) -> None:
        self.report_errors(force=True)
        if self.link is not None:
            self.link.drain()  # alerts the broker acknowledges now need no re-send next time
        self.checkpoint()
        last, det = self.det.last_time, self.det
        fields = {"reason": reason, "last_time": format_time(last) if last is not None else None,
                  "counters": dict(det.counters), "errors": dict(det.errors),
                  "already_processed": self.already, "held_rows": self.timeline.pending,
                  "open_alert": det.judge.alert["alert_id"] if det.judge.alert else None,
                  "channels_lost": det.channels_lost()}
        if control.stop_signal is not None:
            fields["signal"] = signal.Signals(control.stop_signal).name
        self.emit("stop", **fields)
        self.writer.close()


def rows_hint(bundle, exc: HeaderError) -> str:
    """What to do when a feed lacks the time column of a bundle whose training file had none
    (manifest.times_from_rows): the gateway reads every row's time, so give it one."""
    if not (isinstance(exc, NoTimeColumn) and times_from_rows(bundle.manifest)):
        return ""
    step = f"{bundle.period_s:g}"
    return (f"; this bundle was trained on a file without times, one sample per row {step} s "
            f"apart: give every row its time in a column {bundle.time_column!r} (ISO 8601 or "
            f"epoch seconds; row k of that file was k x {step} s)")


# ---------------------------------------------------------------------- checks of saved state
def _checked_saved(saved, path) -> Optional[dict]:
    """The checkpoint's state when it has the expected shape; CheckpointError otherwise."""
    if saved is None:
        return None
    ok = (isinstance(saved, dict) and isinstance(saved.get("detector"), dict)
          and isinstance(saved.get("sinks", {}), dict)
          and all(isinstance(v, dict) for v in saved.get("sinks", {}).values())
          and isinstance(saved.get("input"), (dict, type(None))))
    if not ok:
        raise CheckpointError(f"{path}: state is malformed (not the sections this runtime "
                              "writes); move it aside to start fresh")
    return saved


def _check_restored(det: Detector, bundle) -> None:
    """What a restored detector must satisfy before a row reaches it (ValueError if not)."""
    ring, n = det.ring, len(bundle.channels)
    if (ring.size, ring.n_channels) != (bundle.window, n) or not 0 <= ring.next < ring.size \
            or ring.filled < 0 or not np.isfinite(ring.buf).all():
        raise ValueError("ring does not fit this bundle")
    last = det.last_time
    if last is not None and not (isinstance(last, (int, float)) and math.isfinite(last)
                                 and MIN_TIME <= last < MAX_TIME):
        raise ValueError(f"last_time {last!r} is not a time")
    if det.last_raw is not None and (det.last_raw.shape != (n,)
                                     or not np.isfinite(det.last_raw).all()):
        raise ValueError("last_raw does not fit this bundle")
    for name in ("counters", "errors"):
        table = getattr(det, name)
        if not all(isinstance(k, str) and type(v) is int and v >= 0 for k, v in table.items()):
            raise ValueError(f"{name} are not counts")
    _check_judge(det.judge, n)
    if det.drift is not None:
        _check_drift(det.drift, n)


def _check_drift(drift, n: int) -> None:
    arrays = (drift.in_drift, drift.reported, drift.peak, drift.told, drift.inside,
              drift.outside, drift.outran)
    if any(a.shape != (n,) for a in arrays) or len(drift.since) != n:
        raise ValueError("drift state does not fit this bundle")
    if not (np.isfinite(drift.peak).all() and (drift.peak >= 0).all()
            and np.isfinite(drift.told).all() and (drift.told >= 0).all()
            and (drift.inside >= 0).all() and (drift.outside >= 0).all()):
        raise ValueError("drift state holds impossible counts or excesses")
    if not all(s is None or isinstance(s, str) for s in drift.since):
        raise ValueError("drift state's `since` are not times")
    if any(m.shape != (n,) or not np.isfinite(m).all() for m in drift.past):
        raise ValueError("drift state's past levels do not fit this bundle")


def _check_judge(judge, n: int) -> None:
    if judge.machine.is_open != (judge.alert is not None):
        raise ValueError("alert machine and alert record disagree")
    for _hop, t, parts in judge.recent:
        if len(parts) != n or not math.isfinite(t):
            raise ValueError("recent hops do not fit this bundle")
    a = judge.alert
    if a is not None:
        if not (isinstance(a.get("alert_id"), str) and isinstance(a.get("opened"), str)
                and type(a.get("opened_hop")) is int and type(a.get("hops")) is int
                and isinstance(a.get("threshold"), (int, float))
                and isinstance(a.get("parts_sum"), list) and len(a["parts_sum"]) == n
                and all(isinstance(v, (int, float)) for v in a["parts_sum"])
                and _moved_ok(a.get("moved"))
                and a.get("opened_by") in (None,) + OPENED_BY
                and (a.get("opened_by") != BY_HELD or judge.held is not None)):
            raise ValueError("open alert record is malformed")


def _moved_ok(moved) -> bool:
    """The open alert's `moved` (Detector.moved), or None (states from before it existed)."""
    if moved is None:
        return True
    return (isinstance(moved, dict) and isinstance(moved.get("name"), str)
            and isinstance(moved.get("unit"), str)
            and all(moved.get(k) is None or isinstance(moved.get(k), (int, float))
                    for k in ("score_without", "score", "held_readings", "excess")))


def _clock_bounds(bundle, opts: StreamOptions) -> ClockBounds:
    """No bounds for recorded history; else the bundle's creation minus the backlog, and the
    gateway clock plus max_ahead."""
    if opts.replay:
        return ClockBounds()
    try:
        created = parse_time(bundle.manifest["created"])
    except TimeError:
        created = None
    earliest = None if created is None else created - opts.backlog_days * 86400.0
    return ClockBounds(earliest=earliest, max_ahead=opts.max_ahead)


def _mqtt_link(bundle, opts: StreamOptions, stderr):
    """The broker connection for --mqtt-in / --mqtt-out (connecting in the background), or None."""
    if opts.mqtt is None:
        return None
    from .mqtt import MqttLink

    def log(line: str) -> None:
        stderr.write(line + "\n")
        stderr.flush()

    link = MqttLink(opts.mqtt, bundle, log)
    link.start()
    return link


def _mqtt_source(service: Service, control: Control):
    """Samples from the broker (--mqtt-in), acknowledged once a checkpoint covers them."""
    from .mqtt import MESSAGE_REJECT_KINDS, MqttSource

    source = MqttSource(service.link, service.bundle.channels, service.timed,
                        service.checkpoint, control)
    service.after_checkpoint.append(source.acknowledge)
    for kind in MESSAGE_REJECT_KINDS:
        service.det.errors.setdefault(kind, 0)
    return source


def run_stream(bundle, scorer, opts: StreamOptions, stdout=None, stderr=None, stdin=None) -> int:
    """Run until end of input (or a signal). Returns the process exit code."""
    stdout = stdout or sys.stdout
    stderr = stderr or sys.stderr
    stderr.write("NOTICE: " + ADVISORY_NOTICE + "\n")
    stderr.flush()
    # the handlers come first: once the broker shows the gateway online, a SIGTERM must stop it
    # cleanly (exit 0), not kill it mid-start
    control = Control()
    old_handlers = {}
    for sig in (signal.SIGTERM, signal.SIGINT):
        try:
            old_handlers[sig] = signal.signal(sig, control.handler)
        except ValueError:  # not the main thread: no signal handling
            pass
    try:
        link = _mqtt_link(bundle, opts, stderr)
        try:
            return _serve(bundle, scorer, opts, stdout, stderr, stdin, link, control)
        finally:
            if link is not None:
                link.close()
    finally:
        for sig, old in old_handlers.items():
            signal.signal(sig, old)


def _serve(bundle, scorer, opts: StreamOptions, stdout, stderr, stdin, link,
           control: Control) -> int:
    service = Service(bundle, scorer, opts, stdout, stderr, link=link)
    reader = None
    try:
        if opts.mqtt is not None and opts.mqtt.subscribe is not None:
            source = _mqtt_source(service, control)
        else:
            try:
                reader = open_input(opts.input, opts.follow, stdin or sys.stdin.buffer)
            except OSError:
                service.writer.close()
                raise
            source = None
        service.start_event()
        return service.run(source or service.open_source(reader, control), control)
    finally:
        if reader is not None:
            reader.close()
