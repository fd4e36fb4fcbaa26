"""Events and the sinks they go to.

An event is a flat JSON object {"event": NAME, ...}; EVENTS names every kind the gateway emits.
The service hands each event to every sink, durable sinks first; each sink keeps the kinds it
cares about. A sink is any object with this protocol (a new one is one class in one file):

    handle(event: dict) -> None     take one event; raise OSError when its store fails
    durable_state() -> dict | None  make what was handled durable (fsync / commit) and return
                                    what a restart needs to resume it exactly (kept in the
                                    checkpoint under the sink's `name`); None if nothing
    close() -> None

Built in here: JsonLinesSink (stdout), ScoresCsvSink (--scores-out), AlertDbSink (--alert-db).

Durability: the CSV sink reports its byte size after an fsync, which the checkpoint records; on
resume the file is cut back to that size and the replayed hops append the same rows again, so a
restart neither loses nor duplicates a row. The SQLite sink commits one transaction per alert
change (WAL, synchronous=FULL) and upserts by a deterministic id, so replaying a change
rewrites the same row.
"""

import json
import os
import sqlite3
from pathlib import Path
from typing import List, Optional

EVENTS = (
    "start",  # the service started (with the advisory notice)
    "warmed_up",  # the alert machine's warm-up is over
    "score",  # one scored hop
    "alert_opened",
    "alert_closed",
    "gap",  # a long gap reset the window
    "time_jump",  # the feed's times jumped and enough rows confirmed it (clock.py): from, to
    "clock_suspect",  # the gateway's own clock reads earlier than any plausible row
    "header_changed",  # a header line mid-stream: columns remapped, or rows refused
    "input_rotated",  # the followed file was renamed away or truncated: read the new one
    "input_waiting",  # the followed file does not exist yet
    "input_error",  # rejected rows, counted by kind (rate-limited)
    "heartbeat",
    "stop",  # the service stopped (with every counter)
)
ALERT_EVENTS = ("alert_opened", "alert_closed")
SCORES_HEADER = "time,score,threshold,alert\n"


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


class ScoresCsvSink:
    name = "scores_csv"

    def __init__(self, path, resume: Optional[dict] = None):
        resume_offset = resume.get("offset") if resume else None
        self.path = Path(path)
        self.fh = open(self.path, "ab")
        if resume_offset is not None:
            size = self.fh.seek(0, os.SEEK_END)
            if size < resume_offset:
                raise OSError(
                    f"{self.path}: file is {size} bytes but the checkpoint recorded "
                    f"{resume_offset}; it was edited or truncated - move it aside to start fresh"
                )
            self.fh.truncate(resume_offset)  # rows written after the checkpoint are replayed
        if self.fh.seek(0, os.SEEK_END) == 0:
            self.fh.write(SCORES_HEADER.encode("ascii"))

    def handle(self, event: dict) -> None:
        if event["event"] != "score":
            return
        row = "{},{},{},{}\n".format(
            event["time"], _num(event["score"]), _num(event["threshold"]),
            1 if event["alert_open"] else 0,
        )
        self.fh.write(row.encode("ascii"))
        self.fh.flush()  # visible to readers at once; fsync'd (durable) at each checkpoint

    def durable_state(self) -> dict:
        """Flush + fsync, then the file size: everything before it survives a power cut."""
        self.fh.flush()
        os.fsync(self.fh.fileno())
        return {"offset": self.fh.tell()}

    def close(self) -> None:
        if not self.fh.closed:
            self.fh.flush()
            os.fsync(self.fh.fileno())
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
        " hops INTEGER NOT NULL"
        ")"
    )

    def __init__(self, path):
        self.path = Path(path)
        self.db = sqlite3.connect(str(self.path), isolation_level=None)  # explicit transactions
        self.db.execute("PRAGMA journal_mode=WAL")
        self.db.execute("PRAGMA synchronous=FULL")  # an alert change survives a power cut
        self.db.execute(self.SCHEMA)

    def handle(self, event: dict) -> None:
        if event["event"] not in ALERT_EVENTS:
            return
        row = (
            event["alert_id"], event["bundle_id"],
            "open" if event["event"] == "alert_opened" else "closed",
            event["opened"], event.get("closed"), float(event["peak_score"]),
            float(event["threshold"]), json.dumps(event["channels"], sort_keys=True),
            int(event["hops"]),
        )
        self.db.execute("BEGIN IMMEDIATE")
        try:
            self.db.execute(
                "INSERT OR REPLACE INTO alerts (id, bundle_id, status, opened, closed, "
                "peak_score, threshold, channels, hops) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
                row,
            )
        except Exception:
            self.db.execute("ROLLBACK")
            raise
        self.db.execute("COMMIT")

    def durable_state(self) -> Optional[dict]:
        return None  # each alert change is committed as it is handled

    def close(self) -> None:
        self.db.close()


class EventWriter:
    """Fan an event out to the sinks in the order given (durable sinks first)."""

    def __init__(self, sinks: List):
        self.sinks = list(sinks)

    def emit(self, event: dict) -> dict:
        for sink in self.sinks:
            sink.handle(event)
        return event

    def durable_state(self) -> dict:
        """Every sink made durable; what each needs to resume, by sink name."""
        out = {}
        for sink in self.sinks:
            state = sink.durable_state()
            if state is not None:
                out[sink.name] = state
        return out

    def close(self) -> None:
        for sink in self.sinks:
            sink.close()
