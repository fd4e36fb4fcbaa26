"""A full disk or a read-only store never stops detection (issue 12 item 9): the failing sink
is reported as an event and retried with back-off, the other sinks go on; the scores CSV can be
size-capped with one rotated file, and a restart after SIGKILL stays exact with rotation."""

import json
import os
import random
import signal
import sqlite3
import subprocess
import sys

import pytest
import runtime_fixtures as fx

from ganlet.runtime import cli
from ganlet.runtime.events import SCORES_HEADER, AlertDbSink
from ganlet.runtime.guard import GuardedSink, retry_delay

N_ROWS = 2400
ANOMALIES = [(300, 30, 0, 7.0), (900, 25, 1, 8.0), (1500, 40, 2, 7.5), (2000, 20, 0, -8.0)]
ALERTING = {"warmup_hops": 4, "min_hops": 2, "close_ratio": 0.8, "cooldown_hops": 2}
N_HOPS = (N_ROWS - 16) // 4 + 1


@pytest.fixture(scope="module")
def setup(tmp_path_factory):
    root = tmp_path_factory.mktemp("faults")
    bundle = fx.build_bundle(root / "bundle", alerting=ALERTING, onnx_model=False)
    feed = root / "input.csv"
    fx.write_csv(feed, fx.raw_values(N_ROWS, seed=11, anomalies=ANOMALIES))
    base = root / "base"
    base.mkdir()
    done = stream(bundle, feed, base / "scores.csv", base / "alerts.db", base / "state.json")
    assert done.returncode == 0, done.stderr
    return {"bundle": bundle, "feed": feed, "alerts": alerts(base / "alerts.db"),
            "scores": (base / "scores.csv").read_bytes()}


def stream(bundle, feed, scores, db, state, *extra, popen=False):
    cmd = [sys.executable, str(bundle / "run.py"), "stream", "--input", str(feed),
           "--backend", "numpy", "--scores-out", str(scores), "--alert-db", str(db),
           "--state", str(state), "--heartbeat", "0", *extra]
    if popen:
        return subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL)
    return subprocess.run(cmd, capture_output=True, text=True, timeout=120)


def alerts(db_path):
    # reference: the standard sqlite3 module reading the file the service wrote
    db = sqlite3.connect(f"file:{db_path}?mode=ro", uri=True)
    try:
        return db.execute("SELECT id, status, opened, closed, peak_score, threshold, channels, "
                          "hops FROM alerts ORDER BY opened").fetchall()
    finally:
        db.close()


def events_of(stdout):
    return [json.loads(x) for x in stdout.splitlines()]


@pytest.fixture
def tiny_fs(tmp_path):
    """A tmpfs of a few KiB (a real ENOSPC / EROFS), mounted for this test only."""
    mnt = tmp_path / "mnt"
    mnt.mkdir()
    mounted = []

    def mount(size_kb: int):
        p = subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size_kb}k", "tmpfs", str(mnt)],
                           capture_output=True, text=True)
        if p.returncode != 0:
            pytest.skip(f"cannot mount a tmpfs here (needs root): {p.stderr.strip()}")
        mounted.append(mnt)
        return mnt

    yield mount
    for m in mounted:
        subprocess.run(["umount", "-l", str(m)], capture_output=True)


def test_a_full_disk_for_the_scores_csv_does_not_stop_detection(setup, tmp_path, tiny_fs):
    mnt = tiny_fs(16)  # the scores of this feed need ~27 KiB
    p = stream(setup["bundle"], setup["feed"], mnt / "scores.csv", tmp_path / "alerts.db",
               tmp_path / "state.json")
    assert p.returncode == 0, p.stderr
    events = events_of(p.stdout)
    errors = [e for e in events if e["event"] == "sink_error"]
    assert errors and errors[0]["sink"] == "scores_csv"
    assert "No space left on device" in errors[0]["error"] and errors[0]["retry_in_s"] == 1.0
    assert "sink_error" in p.stderr  # also one line for the journal
    # detection went on: every hop scored, the alert database is exactly the fault-free one
    assert sum(e["event"] == "score" for e in events) == N_HOPS
    stop = next(e for e in events if e["event"] == "stop")
    assert stop["reason"] == "end_of_input" and stop["counters"]["hops"] == N_HOPS
    assert alerts(tmp_path / "alerts.db") == setup["alerts"]
    # what reached the full file is whole rows of the fault-free run, in order
    want = setup["scores"].decode().splitlines()
    got = without_provenance((mnt / "scores.csv").read_bytes()).decode()
    assert got.startswith(SCORES_HEADER) and got.endswith("\n")
    rows = got.splitlines()[1:]
    assert 0 < len(rows) < N_HOPS and all(r in want for r in rows)
    assert rows == sorted(rows, key=want.index)


def test_a_read_only_alert_database_does_not_stop_detection(setup, tmp_path, tiny_fs):
    mnt = tiny_fs(256)
    db = mnt / "alerts.db"
    conn = sqlite3.connect(str(db))
    conn.execute(AlertDbSink.SCHEMA)
    conn.commit()
    conn.close()  # (a `with` block commits but keeps the file open: the remount would fail)
    subprocess.run(["mount", "-o", "remount,ro", str(mnt)], check=True)
    p = stream(setup["bundle"], setup["feed"], tmp_path / "scores.csv", db,
               tmp_path / "state.json")
    assert p.returncode == 0, p.stderr
    events = events_of(p.stdout)
    errors = [e for e in events if e["event"] == "sink_error"]
    assert errors[0]["sink"] == "alert_db" and "readonly" in errors[0]["error"]
    # stdout got every alert, the scores file is exactly the fault-free one
    opened = [e for e in events if e["event"] == "alert_opened"]
    assert [e["alert_id"] for e in opened] == [a[0] for a in setup["alerts"]]
    assert without_provenance((tmp_path / "scores.csv").read_bytes()) == \
        without_provenance(setup["scores"])
    assert alerts(db) == []


def alert_event(kind, alert_id="a1"):
    return {"event": kind, "alert_id": alert_id, "bundle_id": "b" * 64,
            "opened": "2024-01-01T00:00:00Z",
            "closed": "2024-01-01T00:10:00Z" if kind == "alert_closed" else None,
            "peak_score": 5.0, "threshold": 1.0, "hops": 7,
            "channels": [{"name": "flow", "unit": "m3/h", "share": 1.0}]}


def test_a_failed_store_is_retried_with_back_off_and_replays_missed_alerts(tmp_path):
    now = [0.0]
    broken = [True]
    attempts = []

    def opener(_resume):
        attempts.append(now[0])
        if broken[0]:
            raise sqlite3.OperationalError("database or disk is full")
        return AlertDbSink(tmp_path / "alerts.db")

    reports = []
    sink = GuardedSink("alert_db", opener, reports.append, None, AlertDbSink, clock=lambda: now[0])
    sink.handle(alert_event("alert_opened"))
    for step in range(1, 15):  # one score event every second; the DB ignores them
        now[0] = float(step)
        sink.handle({"event": "score"})
    sink.handle(alert_event("alert_closed"))
    assert attempts == [0.0, 1.0, 3.0, 7.0]  # back-off 1, 2, 4 s (next: 8 s)
    assert [r["retry_in_s"] for r in reports] == [1.0, 2.0, 4.0, 8.0]
    assert {r["event"] for r in reports} == {"sink_error"}
    assert reports[0] == {"event": "sink_error", "sink": "alert_db", "failures": 1,
                          "error": "OperationalError: database or disk is full",
                          "retry_in_s": 1.0}
    broken[0] = False
    now[0] = 15.0
    sink.handle({"event": "score"})
    assert reports[-1] == {"event": "sink_recovered", "sink": "alert_db", "down_s": 15.0,
                           "missed": 2, "replayed": 1}
    sink.close()
    rows = alerts(tmp_path / "alerts.db")
    assert [(r[0], r[1], r[3]) for r in rows] == [("a1", "closed", "2024-01-01T00:10:00Z")]
    assert [retry_delay(n) for n in (1, 2, 9, 10, 50)] == [1.0, 2.0, 256.0, 300.0, 300.0]


def without_provenance(data: bytes) -> bytes:
    """A scores file without its `#` provenance lines (runtime/events.py)."""
    return b"".join(ln for ln in data.splitlines(keepends=True) if not ln.startswith(b"#"))


def rows_of(data: bytes):
    return without_provenance(data).decode().splitlines()[1:]


def test_scores_are_capped_with_one_rotated_file(setup, tmp_path):
    cap = 4096
    p = stream(setup["bundle"], setup["feed"], tmp_path / "scores.csv", tmp_path / "alerts.db",
               tmp_path / "state.json", "--scores-max-mb", str(cap / 2 ** 20))
    assert p.returncode == 0, p.stderr
    longest = max(len(r) + 1 for r in rows_of(setup["scores"]))
    current, rotated = tmp_path / "scores.csv", tmp_path / "scores.csv.1"
    for f in (current, rotated):
        assert without_provenance(f.read_bytes()).startswith(SCORES_HEADER.encode())
        assert f.stat().st_size < cap + longest
    kept = rows_of(rotated.read_bytes()) + rows_of(current.read_bytes())
    assert kept == rows_of(setup["scores"])[-len(kept):]  # the newest rows, none missing
    assert len(kept) > 100
    assert alerts(tmp_path / "alerts.db") == setup["alerts"]


def test_sigkill_with_rotation_loses_and_duplicates_nothing(setup, tmp_path):
    cap = str(4096 / 2 ** 20)
    base = tmp_path / "base"
    base.mkdir()
    done = stream(setup["bundle"], setup["feed"], base / "scores.csv", base / "alerts.db",
                  base / "state.json", "--scores-max-mb", cap)
    assert done.returncode == 0, done.stderr
    run = tmp_path / "run"
    run.mkdir()
    rng = random.Random(20240707)  # seeded: the same kill points every time
    kills = 0
    for target in sorted(rng.sample(range(5, N_HOPS - 5), 6)):
        p = stream(setup["bundle"], setup["feed"], run / "scores.csv", run / "alerts.db",
                   run / "state.json", "--scores-max-mb", cap, "--checkpoint-every",
                   rng.choice(["0", "0.01"]), popen=True)
        for line in p.stdout:
            if json.loads(line).get("hop", -1) >= target:
                os.kill(p.pid, signal.SIGKILL)
                break
        p.wait(timeout=60)
        p.stdout.close()
        kills += p.returncode == -signal.SIGKILL
    assert kills >= 4  # precondition: it really died mid-stream
    final = stream(setup["bundle"], setup["feed"], run / "scores.csv", run / "alerts.db",
                   run / "state.json", "--scores-max-mb", cap)
    assert final.returncode == 0, final.stderr
    for name in ("scores.csv", "scores.csv.1"):
        assert without_provenance((run / name).read_bytes()) == \
            without_provenance((base / name).read_bytes()), name
    assert alerts(run / "alerts.db") == alerts(base / "alerts.db") == setup["alerts"]


def test_an_unexpected_error_has_its_own_exit_code(setup, monkeypatch, capsys):
    def broken(*_args, **_kwargs):
        raise RuntimeError("a bug")

    monkeypatch.setattr(cli, "make_scorer", broken)
    code = cli.main(["stream", "--input", str(setup["feed"])], bundle_dir=setup["bundle"])
    assert code == cli.EXIT_INTERNAL == 4
    err = capsys.readouterr().err
    assert "internal error" in err and "RuntimeError: a bug" in err
