"""Events and the sinks they go to.

An event is a flat JSON object {"event": NAME, ...}; EVENTS names every kind the gateway emits.
The service hands each event to every sink, durable sinks first; each sink keeps the kinds it
cares about. A sink is any object with this protocol (a new one is one class in one file):

    handle(event: dict) -> None     take one event; raise OSError when its store fails
    durable_state() -> dict | None  make what was handled durable (fsync / commit) and return
                                    what a restart needs to resume it exactly (kept in the
                                    checkpoint under the sink's `name`); None if nothing
    close() -> None

    accepts(event: dict) -> bool    (optional) whether handle would store it; default: all
    recovery_state() -> dict | None (optional) what a reopen after a store failure needs
    wants_checkpoint() -> bool      (optional) ask the service for a checkpoint now

Built in here: JsonLinesSink (stdout), ScoresCsvSink (--scores-out), AlertDbSink (--alert-db).
EventWriter wraps each in a guard.GuardedSink: a store that fails (disk full, read-only, file
removed) becomes a sink_error event, is retried with back-off, and the other sinks go on.

Scores CSV provenance: a new scores file starts with `# key: value` comment lines (PROVENANCE_KEYS:
the bundle, the runtime's Python / numpy, the machine, the start time), then the column header;
pandas.read_csv(comment="#") and compile/gateway.py read_scores skip them. Rows of another bundle
are never appended to a file that says it holds this one's.

Durability: the CSV sink reports its byte size after an fsync, which the checkpoint records; on
resume the file is cut back to that size and the replayed hops append the same rows again, so a
restart neither loses nor duplicates a row. With a size cap (--scores-max-mb) the CSV is
rotated to NAME.1 only inside a checkpoint (it asks for one when full), so at most one rotation
can lie after the last checkpoint, and a restart undoes it when the recorded size says so. The SQLite sink commits one transaction per alert
change (WAL, synchronous=FULL) and upserts by a deterministic id, so replaying a change
rewrites the same row.
"""

import json
import os
import platform
import sqlite3
import time
from pathlib import Path
from typing import Callable, Dict, List, Optional, TextIO, Tuple

import numpy as np

from .guard import GuardedSink
from .intake import format_time

EVENTS = (
    "start",  # the service started (with the advisory notice)
    "warmed_up",  # the alert machine's warm-up is over
    "score",  # one scored hop
    "alert_opened",
    "alert_closed",
    "gap",  # a long gap reset the window
    "channel_lost",  # a channel's cells stayed blank past max_gap_periods: scored without it
    "channel_back",  # a lost channel reads again; it rejoins the score after a window
    "drift",  # a channel slowly left its training range and is re-centred (drift.py)
    "drift_grew",  # a reported drift's excess doubled since it was last announced
    "drift_ended",  # a reported drift is over: back inside the range, or moving too fast
    "reading_held",  # a reading repeated past its limit while another alert was open (held.py)
    "time_jump",  # the feed's times jumped and enough rows confirmed it (clock.py): from, to
    "clock_suspect",  # the gateway's own clock reads earlier than any plausible row
    "header_changed",  # a header line mid-stream: columns remapped, or rows refused
    "input_rotated",  # the followed file was renamed away or truncated: read the new one
    "input_waiting",  # the followed file does not exist yet
    "input_error",  # rejected rows, counted by kind (rate-limited)
    "heartbeat",
    "sink_error",  # a store failed (sink name, error, retry_in_s); the other sinks go on
    "sink_recovered",  # a failed store works again (down_s, missed events, replayed alerts)
    "stop",  # the service stopped (with every counter)
)
ALERT_EVENTS = ("alert_opened", "alert_closed")
SCORES_HEADER = "time,score,threshold,alert\n"
PROVENANCE_KEYS = ("bundle_id", "bundle_name", "tool_version", "backend", "python", "numpy",
                   "machine", "platform", "host", "started")


def _num(x) -> str:
    # 9 significant digits round-trip a float32 exactly; a non-finite value is an empty cell
    return "" if x is None else format(float(x), ".9g")


class JsonLinesSink:
    name = "stdout"

    def __init__(self, stream, score_every: int = 1):
        self.stream = stream
        self.score_every = int(score_every)

    def handle(self, event: dict) -> None:
        if event["event"] == "score":
            if self.score_every <= 0 or event["hop"] % self.score_every != 0:
                return
        self.stream.write(json.dumps(event, separators=(",", ":"), allow_nan=False) + "\n")
        self.stream.flush()

    def durable_state(self) -> Optional[dict]:
        return None  # at-least-once: replayed hops print their events again

    def close(self) -> None:
        try:
            self.stream.flush()
        except (OSError, ValueError):
            pass


def scores_provenance(bundle, backend: str) -> Dict[str, str]:
    """Where a scores file comes from: the bundle, this runtime's interpreter, the machine."""
    return {
        "bundle_id": bundle.bundle_id, "bundle_name": bundle.manifest["name"],
        "tool_version": bundle.manifest["tool_version"], "backend": backend,
        "python": platform.python_version(), "numpy": np.__version__,
        "machine": platform.machine(), "platform": platform.platform(),
        "host": platform.node(), "started": format_time(time.time()),
    }


def provenance_lines(provenance: Dict[str, str]) -> bytes:
    """`# key: value` lines, one per known key (line breaks in a value become spaces)."""
    lines = ["# ganlet scores: one row per scored hop, times in UTC\n"]
    for key in PROVENANCE_KEYS:
        if key in provenance:
            value = " ".join(str(provenance[key]).split())
            lines.append(f"# {key}: {value}\n")
    return "".join(lines).encode("utf-8", "replace")


def read_provenance(fh) -> Dict[str, str]:
    """The `# key: value` lines at the top of a scores file opened in binary mode."""
    out = {}
    for raw in fh:
        if not raw.startswith(b"#"):
            break
        key, sep, value = raw[1:].decode("utf-8", "replace").strip().partition(": ")
        if sep and key in PROVENANCE_KEYS:
            out[key] = value.strip()
    return out


def refuse_other_bundle(path, provenance: Dict[str, str]) -> None:
    """A scores file that says it holds another bundle's scores is never appended to (OSError:
    the service stops at start with exit 3 instead of mixing two bundles' rows)."""
    path = Path(path)
    if not path.is_file() or "bundle_id" not in provenance:
        return
    with open(path, "rb") as fh:
        theirs = read_provenance(fh).get("bundle_id")
    if theirs and theirs != provenance["bundle_id"]:
        raise OSError(f"{path} holds scores of bundle {theirs[:12]}, not of this "
                      f"bundle {provenance['bundle_id'][:12]}; move it aside or choose "
                      "another --scores-out")


class ScoresCsvSink:
    """time,score,threshold,alert per hop. resume: {"offset": n} from the checkpoint (cut the
    file back to n bytes), or {"offset": n, "repair": True} after a failure in this process
    (cut back a torn last row; a file someone shortened meanwhile is appended to).
    max_bytes: rotate to NAME.1 (one old file kept) at the next checkpoint once reached.
    provenance: the `# key: value` lines a new file starts with (scores_provenance)."""

    name = "scores_csv"

    def __init__(self, path, resume: Optional[dict] = None, max_bytes: Optional[int] = None,
                 provenance: Optional[Dict[str, str]] = None):
        self.path = Path(path)
        self.rotated = self.path.with_name(self.path.name + ".1")
        self.max_bytes = max_bytes
        self.head = provenance_lines(provenance or {}) + SCORES_HEADER.encode("ascii")
        self.fh = open(self.path, "ab")
        try:
            self._resume(resume or {})
            if self.fh.seek(0, os.SEEK_END) == 0:
                self.fh.write(self.head)
                self.fh.flush()
        except BaseException:
            self.fh.close()
            raise
        self.good = self.fh.tell()  # end of the last complete row

    def _resume(self, resume: dict) -> None:
        offset = resume.get("offset")
        if offset is None:
            return
        size = self.fh.seek(0, os.SEEK_END)
        if size < offset and self._undo_rotation(offset):
            size = self.fh.seek(0, os.SEEK_END)
        if size >= offset:
            self.fh.truncate(offset)  # rows written after the checkpoint are replayed
        elif not resume.get("repair"):
            raise OSError(
                f"{self.path}: file is {size} bytes but the checkpoint recorded "
                f"{offset}; it was edited or truncated - move it aside to start fresh"
            )

    def _undo_rotation(self, offset: int) -> bool:
        """A rotation after the last checkpoint: the recorded rows are in NAME.1; put it back."""
        if not (self.max_bytes and self.rotated.is_file()
                and self.rotated.stat().st_size >= offset):
            return False
        self.fh.close()
        os.replace(str(self.rotated), str(self.path))
        self.fh = open(self.path, "ab")
        return True

    @staticmethod
    def accepts(event: dict) -> bool:
        return event["event"] == "score"

    def handle(self, event: dict) -> None:
        if event["event"] != "score":
            return
        row = "{},{},{},{}\n".format(
            event["time"], _num(event["score"]), _num(event["threshold"]),
            1 if event["alert_open"] else 0,
        )
        self.fh.write(row.encode("ascii"))
        self.fh.flush()  # visible to readers at once; fsync'd (durable) at each checkpoint
        self.good = self.fh.tell()

    def wants_checkpoint(self) -> bool:
        return bool(self.max_bytes) and self.good >= self.max_bytes

    def durable_state(self) -> dict:
        """Flush + fsync (rotating first when full), then the file size: everything before it
        survives a power cut."""
        if self.wants_checkpoint():
            self._rotate()
        self.fh.flush()
        os.fsync(self.fh.fileno())
        return {"offset": self.fh.tell()}

    def _rotate(self) -> None:
        self.fh.flush()
        os.fsync(self.fh.fileno())
        self.fh.close()
        os.replace(str(self.path), str(self.rotated))
        self.fh = open(self.path, "ab")
        self.fh.write(self.head)
        self.fh.flush()
        self.good = self.fh.tell()

    def recovery_state(self) -> dict:
        return {"offset": self.good, "repair": True}

    def abandon(self) -> None:
        """After a store failure: close without the flush that would fail again, and cut a
        torn last row off at once (truncating needs no free space)."""
        try:
            self.fh.close()
        except OSError:
            pass  # the unwritten buffer is dropped; its rows are counted as missed
        try:
            if self.path.stat().st_size > self.good:
                os.truncate(str(self.path), self.good)
        except OSError:
            pass

    def close(self) -> None:
        if not self.fh.closed:
            try:
                self.fh.flush()
                os.fsync(self.fh.fileno())
            finally:
                self.fh.close()


class AlertDbSink:
    name = "alert_db"
    SCHEMA = (
        "CREATE TABLE IF NOT EXISTS alerts ("
        " id TEXT PRIMARY KEY,"
        " bundle_id TEXT NOT NULL,"
        " status TEXT NOT NULL,"  # open | closed
        " opened TEXT NOT NULL,"
        " closed TEXT,"
        " peak_score REAL NOT NULL,"
        " threshold REAL NOT NULL,"
        " channels TEXT NOT NULL,"  # JSON list of {name, unit, share}
        " hops INTEGER NOT NULL,"
        " moved TEXT"  # JSON {name, unit, score_without, score} (or held_readings), or NULL
        ")"
    )

    replays_missed = True  # alert changes missed while the store failed are written on recovery

    def __init__(self, path):
        self.path = Path(path)
        self.db = sqlite3.connect(str(self.path), isolation_level=None)  # explicit transactions
        try:
            self.db.execute("PRAGMA journal_mode=WAL")
            self.db.execute("PRAGMA synchronous=FULL")  # an alert change survives a power cut
            self.db.execute(self.SCHEMA)
            columns = [r[1] for r in self.db.execute("PRAGMA table_info(alerts)")]
            if "moved" not in columns:  # a database from before alerts named the moved channel
                self.db.execute("ALTER TABLE alerts ADD COLUMN moved TEXT")
        except BaseException:
            self.db.close()
            raise

    @staticmethod
    def accepts(event: dict) -> bool:
        return event["event"] in ALERT_EVENTS

    def handle(self, event: dict) -> None:
        if event["event"] not in ALERT_EVENTS:
            return
        row = (
            event["alert_id"], event["bundle_id"],
            "open" if event["event"] == "alert_opened" else "closed",
            event["opened"], event.get("closed"), float(event["peak_score"]),
            float(event["threshold"]), json.dumps(event["channels"], sort_keys=True),
            int(event["hops"]),
            json.dumps(event["moved"], sort_keys=True) if event.get("moved") else None,
        )
        self.db.execute("BEGIN IMMEDIATE")
        try:
            self.db.execute(
                "INSERT OR REPLACE INTO alerts (id, bundle_id, status, opened, closed, "
                "peak_score, threshold, channels, hops, moved) "
                "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                row,
            )
            self.db.execute("COMMIT")
        except Exception:
            if self.db.in_transaction:
                self.db.execute("ROLLBACK")
            raise

    def durable_state(self) -> Optional[dict]:
        return None  # each alert change is committed as it is handled

    def close(self) -> None:
        self.db.close()


class EventWriter:
    """Fan an event out to the sinks in the order given (durable sinks first)."""

    def __init__(self, sinks: List):
        self.sinks = list(sinks)
        self.queue = []  # type: List[dict]

    @classmethod
    def guarded(cls, openers: List[Tuple[type, Callable]], resume: dict,
                notice: Optional[TextIO] = None) -> "EventWriter":
        """Sinks from (sink class, open(resume) -> sink) pairs, each behind a GuardedSink whose
        sink_error / sink_recovered events go to every sink after the current event (and a
        line to `notice`, the service's stderr)."""
        writer = cls([])

        def report(event: dict) -> None:
            writer.queue.append(event)
            if notice is not None:
                fields = {k: v for k, v in event.items() if k != "event"}
                notice.write(f"{event['event']}: {json.dumps(fields, sort_keys=True)}\n")
                notice.flush()

        writer.sinks = [GuardedSink(kind.name, opener, report, resume.get(kind.name), kind)
                        for kind, opener in openers]
        return writer

    def emit(self, event: dict) -> dict:
        self._fan_out(event)
        self._drain()
        return event

    def _fan_out(self, event: dict) -> None:
        for sink in self.sinks:
            sink.handle(event)

    def _drain(self) -> None:
        while self.queue:
            self._fan_out(self.queue.pop(0))

    def wants_checkpoint(self) -> bool:
        return any(getattr(s, "wants_checkpoint", lambda: False)() for s in self.sinks)

    def durable_state(self) -> dict:
        """Every sink made durable; what each needs to resume, by sink name."""
        out = {}
        for sink in self.sinks:
            state = sink.durable_state()
            if state is not None:
                out[sink.name] = state
        self._drain()
        return out

    def close(self) -> None:
        self._drain()
        for sink in self.sinks:
            sink.close()
