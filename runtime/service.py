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
"""

import signal
import sys
import time
from typing import Optional

from .checkpoint import CheckpointError, load_checkpoint, save_checkpoint
from .detector import Detector
from .events import ALERT_EVENTS, AlertDbSink, EventWriter, JsonLinesSink, ScoresCsvSink
from .intake import REJECT_KINDS, HeaderError, RowError, format_time
from .sources import Control, CsvSource, Stop

ADVISORY_NOTICE = (
    "ganlet detection is advisory condition monitoring. It is not a safety function and does "
    "not replace trips, interlocks or protection devices; local codes and licensed practice "
    "govern the installation."
)
ERROR_REPORT_INTERVAL_S = 5.0  # input_error events at most this often (first one at once)


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
        mqtt=None,
    ):
        self.input = input
        self.follow = follow
        self.state = state
        self.scores_out = scores_out
        self.alert_db = alert_db
        self.score_every = score_every
        self.checkpoint_every = checkpoint_every
        self.heartbeat = heartbeat
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
        self.writer = EventWriter(self._sinks(stdout, (saved or {}).get("sinks", {})))
        self.det = Detector(bundle, scorer)
        self.det.errors.update({k: 0 for k in REJECT_KINDS})
        if saved:
            try:
                self.det.restore(saved["detector"])
            except (KeyError, TypeError, ValueError) as exc:
                self.writer.close()
                raise CheckpointError(
                    f"{opts.state}: state cannot be restored ({exc}); move it aside to start fresh"
                ) from None
        self.resumed = bool(saved)
        self.resume_after = self.det.last_time if saved else None
        self.timers = _Timers(time.monotonic())
        self.pending_errors = {}  # kind -> count since the last input_error event
        self.example = {}
        self.already = 0  # lines of the replay prefix after a restart
        if opts.state and not saved:
            self.checkpoint()  # so a crash before the first timed checkpoint resumes cleanly

    def _sinks(self, stdout, resume: dict) -> list:
        sinks = []
        if self.opts.alert_db:
            sinks.append(AlertDbSink(self.opts.alert_db))
        if self.opts.scores_out:
            sinks.append(ScoresCsvSink(self.opts.scores_out, resume=resume.get("scores_csv")))
        sinks.extend(_mqtt_sinks(self.link, self.opts, resume))
        sinks.append(JsonLinesSink(stdout, self.opts.score_every))
        return sinks

    def emit(self, event_name: str, /, **fields) -> None:
        self.writer.emit(dict(event=event_name, **fields))

    def checkpoint(self) -> None:
        if self.opts.state:
            save_checkpoint(self.opts.state, self.bundle.bundle_id,
                            {"detector": self.det.state(), "sinks": self.writer.durable_state()})
        for hook in self.after_checkpoint:
            hook()

    # ------------------------------------------------------------------ per record
    def handle(self, rec) -> None:
        if self.resume_after is not None:
            # Replay prefix after a restart: every line up to the first one whose time is
            # later than the checkpoint was handled before; skip it quietly. (A bad line with
            # no readable time in this prefix is counted here too: it cannot be told apart
            # from one the previous run already counted.)
            if rec.time is None or rec.time <= self.resume_after:
                self.already += 1
                return
            self.resume_after = None
        self.det.counters["lines"] += 1
        if rec.blank:
            self.det.counters["blank_lines"] += 1
            return
        if rec.error is not None:
            self.reject(rec.error, rec.lineno)
            return
        try:
            events = self.det.feed(rec.time, rec.values)
        except RowError as exc:
            self.reject(exc, rec.lineno)
            return
        for event in events:
            self.writer.emit(event)
        if any(e["event"] in ALERT_EVENTS for e in events):
            self.checkpoint()

    def reject(self, exc: RowError, lineno: int) -> None:
        self.det.errors[exc.kind] = self.det.errors.get(exc.kind, 0) + 1
        self.pending_errors[exc.kind] = self.pending_errors.get(exc.kind, 0) + 1
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
                      counters=dict(self.det.counters))
        if opts.checkpoint_every and now - t.checkpoint >= opts.checkpoint_every:
            t.checkpoint = now
            self.checkpoint()
        self.report_errors(force=False)

    # ------------------------------------------------------------------ the run
    def start_event(self) -> None:
        b = self.bundle
        self.emit("start", bundle_id=b.bundle_id, name=b.manifest["name"],
                  tool_version=b.manifest["tool_version"], backend=self.det.scorer.name,
                  channels=list(b.channels), window=b.window, hop=b.hop, period_s=b.period_s,
                  threshold=b.threshold_policy.get("kind"), resumed=self.resumed,
                  resume_after=(format_time(self.resume_after)
                                if self.resume_after is not None else None),
                  notice=ADVISORY_NOTICE)

    def run(self, source, control: Control) -> int:
        """Read Records from `source` (sources.py) until it ends or a signal stops it."""
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
            self.stderr.write(f"error: {exc}\n")
        self.finish(reason, control)
        return code

    def finish(self, reason: str, control: Control) -> None:
        self.report_errors(force=True)
        if self.link is not None:
            self.link.drain()  # alerts the broker acknowledges now need no re-send next time
        self.checkpoint()
        last, det = self.det.last_time, self.det
        fields = {"reason": reason, "last_time": format_time(last) if last is not None else None,
                  "counters": dict(det.counters), "errors": dict(det.errors),
                  "already_processed": self.already,
                  "open_alert": det.judge.alert["alert_id"] if det.judge.alert else None}
        if control.stop_signal is not None:
            fields["signal"] = signal.Signals(control.stop_signal).name
        self.emit("stop", **fields)
        self.writer.close()


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


def _mqtt_sinks(link, opts: StreamOptions, resume: dict) -> list:
    if link is None or not opts.mqtt.publish:
        return []
    from .mqtt import MqttSink

    return [MqttSink(link, resume=resume.get(MqttSink.name))]


def _open_source(service: Service, opts: StreamOptions, control: Control, stdin):
    """(the Record source, the file to close afterwards or None): MQTT, a file, or stdin."""
    if opts.mqtt is not None and opts.mqtt.subscribe is not None:
        from .mqtt import MESSAGE_REJECT_KINDS, MqttSource

        source = MqttSource(service.link, service.bundle.channels, service.timed,
                            service.checkpoint, control)
        service.after_checkpoint.append(source.acknowledge)
        service.det.errors.update({k: 0 for k in MESSAGE_REJECT_KINDS if k not in service.det.errors})
        return source, None
    own_input = opts.input != "-"
    fh = open(opts.input, "rb") if own_input else (stdin or sys.stdin.buffer)
    source = CsvSource(fh, service.bundle.time_column, service.bundle.channels, opts.follow,
                       service.timed, control)
    return source, (fh if own_input else None)


def run_stream(bundle, scorer, opts: StreamOptions, stdout=None, stderr=None, stdin=None) -> int:
    """Run until end of input (or a signal). Returns the process exit code."""
    stdout = stdout or sys.stdout
    stderr = stderr or sys.stderr
    stderr.write("NOTICE: " + ADVISORY_NOTICE + "\n")
    stderr.flush()
    link = _mqtt_link(bundle, opts, stderr)
    try:
        return _serve(bundle, scorer, opts, stdout, stderr, stdin, link)
    finally:
        if link is not None:
            link.close()


def _serve(bundle, scorer, opts: StreamOptions, stdout, stderr, stdin, link) -> int:
    service = Service(bundle, scorer, opts, stdout, stderr, link=link)
    control = Control()
    old_handlers = {}
    for sig in (signal.SIGTERM, signal.SIGINT):
        try:
            old_handlers[sig] = signal.signal(sig, control.handler)
        except ValueError:  # not the main thread: no signal handling
            pass
    service.start_event()
    source, own_fh = _open_source(service, opts, control, stdin)
    try:
        return service.run(source, control)
    finally:
        if own_fh is not None:
            own_fh.close()
        for sig, old in old_handlers.items():
            signal.signal(sig, old)
