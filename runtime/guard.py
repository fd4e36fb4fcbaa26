"""A sink whose store may fail: detection must not stop because a disk is full.

GuardedSink wraps one sink. When its store raises (OSError: disk full, read-only file system,
file removed; sqlite3.Error: "database or disk is full", "attempt to write a readonly
database"), the sink is closed, a `sink_error` event (sink name, error, retry_in_s) goes to the
other sinks, and the store is reopened at the next event after a back-off that doubles from
FIRST_RETRY_S up to MAX_RETRY_S (exponential back-off with a cap: common practice). While it is
down, events it would have stored are counted as missed; a sink that `replays_missed` (the alert
database) keeps the latest change of each alert and writes them on recovery, so an alert that
opened while the disk was full is in the database once there is room again (as long as the
process lives). Recovery emits `sink_recovered` (down_s, missed, replayed).

What the checkpoint records for a failed sink is its last durable state, so a restart cuts the
scores file back to rows known to be complete.
"""

import sqlite3
import time
from typing import Callable, Optional

STORE_ERRORS = (OSError, sqlite3.Error)
FIRST_RETRY_S = 1.0
MAX_RETRY_S = 300.0
MAX_PENDING = 10000  # alert changes kept for replay while a store is down


def retry_delay(failures: int) -> float:
    """Seconds before the next attempt after `failures` failures in a row (1, 2, 4, ... 300)."""
    return min(MAX_RETRY_S, FIRST_RETRY_S * 2.0 ** (max(failures, 1) - 1))


class GuardedSink:
    def __init__(self, name: str, opener: Callable, report: Callable[[dict], None],
                 resume: Optional[dict] = None, kind=None,
                 clock: Callable[[], float] = time.monotonic):
        self.name = name
        self.opener = opener  # resume -> sink; raises a STORE_ERROR when the store is unusable
        self.kind = kind  # the sink's class: its static accepts() and replays_missed
        self.report = report
        self.clock = clock
        self.sink = None
        self.durable = resume  # last state known durable (what the checkpoint may record)
        self.recovery = resume  # what the next open needs
        self.failures = 0
        self.retry_at = 0.0
        self.down_since = None  # type: Optional[float]
        self.missed = 0
        self.pending = {}  # alert_id -> its latest change, kept while the store is down
        self._open()

    # ---------------------------------------------------------------- the sink protocol
    def accepts(self, event: dict) -> bool:
        accepts = getattr(self.kind, "accepts", None)
        return accepts(event) if accepts is not None else True

    def handle(self, event: dict) -> None:
        if self.sink is None and not self._recover():
            self._miss(event)
            return
        try:
            self.sink.handle(event)
        except STORE_ERRORS as exc:
            self._miss(event)
            self._fail(exc)

    def wants_checkpoint(self) -> bool:
        return self.sink is not None and getattr(self.sink, "wants_checkpoint", lambda: False)()

    def durable_state(self) -> Optional[dict]:
        if self.sink is not None:
            try:
                self.durable = self.sink.durable_state()
            except STORE_ERRORS as exc:
                self._fail(exc)
        return self.durable

    def close(self) -> None:
        if self.sink is not None:
            try:
                self.sink.close()
            except STORE_ERRORS:
                pass
            self.sink = None

    # ---------------------------------------------------------------- failure and recovery
    def _open(self) -> bool:
        try:
            sink = self.opener(self.recovery)
        except STORE_ERRORS as exc:
            self._fail(exc)
            return False
        self.sink = sink
        return True

    def _recover(self) -> bool:
        if self.clock() < self.retry_at or not self._open():
            return False
        try:
            for event in self.pending.values():
                self.sink.handle(event)
        except STORE_ERRORS as exc:
            self._fail(exc)
            return False
        now = self.clock()
        since = now if self.down_since is None else self.down_since
        self.report({"event": "sink_recovered", "sink": self.name,
                     "down_s": round(now - since, 3), "missed": self.missed,
                     "replayed": len(self.pending)})
        self.failures, self.missed, self.down_since = 0, 0, None
        self.pending.clear()
        return True

    def _miss(self, event: dict) -> None:
        if not self.accepts(event):
            return
        self.missed += 1
        if getattr(self.kind, "replays_missed", False) and "alert_id" in event:
            self.pending.pop(event["alert_id"], None)  # keep the latest change, in order
            self.pending[event["alert_id"]] = event
            while len(self.pending) > MAX_PENDING:
                self.pending.pop(next(iter(self.pending)))

    def _fail(self, exc: Exception) -> None:
        if self.sink is not None:
            recovery = getattr(self.sink, "recovery_state", None)
            self.recovery = recovery() if recovery is not None else self.recovery
            abandon = getattr(self.sink, "abandon", None)
            if abandon is not None:
                abandon()
                self.sink = None
            else:
                self.close()
        elif isinstance(self.recovery, dict):
            # a store that could not even be opened: a retry takes the file as it finds it
            self.recovery = dict(self.recovery, repair=True)
        now = self.clock()
        self.failures += 1
        self.down_since = now if self.down_since is None else self.down_since
        delay = retry_delay(self.failures)
        self.retry_at = now + delay
        self.report({"event": "sink_error", "sink": self.name,
                     "error": f"{type(exc).__name__}: {exc}", "retry_in_s": delay,
                     "failures": self.failures})
