"""Power cuts: SIGKILL the stream at random points, restart with the same state; the alert
database and the scores file end up exactly as after one uninterrupted run."""

import json
import os
import random
import signal
import sqlite3
import subprocess
import sys
import time

import pytest
import runtime_fixtures as fx

N_ROWS = 2400
ANOMALIES = [(300, 30, 0, 7.0), (900, 25, 1, 8.0), (1500, 40, 2, 7.5), (2000, 20, 0, -8.0)]
ALERTING = {"warmup_hops": 4, "min_hops": 2, "close_ratio": 0.8, "cooldown_hops": 2}


@pytest.fixture(scope="module")
def setup(tmp_path_factory):
    root = tmp_path_factory.mktemp("crash")
    bundle = fx.build_bundle(root / "bundle", alerting=ALERTING, onnx_model=False)
    fx.write_csv(root / "input.csv", fx.raw_values(N_ROWS, seed=11, anomalies=ANOMALIES))
    return bundle, root / "input.csv"


def _cmd(bundle, inp, out_dir, *extra):
    return [sys.executable, str(bundle / "run.py"), "stream", "--input", str(inp),
            "--backend", "numpy", "--state", str(out_dir / "state.json"),
            "--scores-out", str(out_dir / "scores.csv"), "--alert-db", str(out_dir / "alerts.db"),
            "--heartbeat", "0", *extra]


def _alerts(db_path):
    # reference: the standard sqlite3 module reading the file the service wrote
    with sqlite3.connect(str(db_path)) as db:
        return db.execute("SELECT id, status, opened, closed, peak_score, threshold, channels, "
                          "hops FROM alerts ORDER BY opened").fetchall()


def split_scores(path):
    """(the `#` provenance lines, the CSV after them) of a scores file, as bytes."""
    data = path.read_bytes()
    lines = data.splitlines(keepends=True)
    n = next(k for k, line in enumerate(lines) if not line.startswith(b"#"))
    head = b"".join(lines[:n])
    assert b"# bundle_id: " in head and b"# started: " in head
    return head, data[len(head):]


def provenance_without_start(head: bytes) -> bytes:
    # the start time differs between two runs; everything else describes the same gateway
    return b"".join(ln for ln in head.splitlines(keepends=True) if not ln.startswith(b"# started"))


def test_sigkill_anywhere_loses_and_duplicates_nothing(setup, tmp_path):
    bundle, inp = setup
    base = tmp_path / "base"
    base.mkdir()
    done = subprocess.run(_cmd(bundle, inp, base), capture_output=True, text=True, timeout=60)
    assert done.returncode == 0, done.stderr
    want_alerts = _alerts(base / "alerts.db")
    head, want_scores = split_scores(base / "scores.csv")
    assert len(want_alerts) >= 3 and all(a[1] == "closed" for a in want_alerts)
    n_hops = (N_ROWS - 16) // 4 + 1
    assert want_scores.count(b"\n") == n_hops + 1  # column header + one row per hop

    run = tmp_path / "crashy"
    run.mkdir()
    rng = random.Random(20240601)  # seeded: the same kill points every time
    targets = sorted(rng.sample(range(5, n_hops - 5), 6))
    kills = 0
    # kill points, moving forward through the stream: random hops, alternating with "right
    # after the next alert event" (in the middle of the alert's bookkeeping)
    plan = []
    for t in targets:
        plan += [("hop", t), ("alert", None)]
    for kind, target in plan:
        every = rng.choice(["0", "0.01", "0.05"])
        p = subprocess.Popen(_cmd(bundle, inp, run, "--checkpoint-every", every),
                             stdout=subprocess.PIPE, stderr=subprocess.DEVNULL)
        killed = False
        for line in p.stdout:
            ev = json.loads(line)
            hit = (kind == "hop" and ev["event"] == "score" and ev["hop"] >= target) or (
                kind == "alert" and ev["event"] in ("alert_opened", "alert_closed"))
            if hit:
                os.kill(p.pid, signal.SIGKILL)
                killed = True
                break
        p.wait(timeout=60)
        p.stdout.close()
        kills += killed and p.returncode == -signal.SIGKILL
    assert kills >= 8  # precondition: the process really died mid-stream several times

    final = subprocess.run(_cmd(bundle, inp, run), capture_output=True, text=True, timeout=60)
    assert final.returncode == 0, final.stderr
    got = _alerts(run / "alerts.db")
    assert [a[0] for a in got] == [a[0] for a in want_alerts]  # same ids, none extra
    assert got == want_alerts  # same open/close times, peaks, thresholds, channels
    run_head, scores = split_scores(run / "scores.csv")
    rows = scores.splitlines()[1:]
    times = [r.split(b",")[0] for r in rows]
    assert len(times) == len(set(times))  # no duplicated row
    assert scores == want_scores  # and none missing or different
    # one provenance block, written at the first start and kept through every resume
    assert provenance_without_start(run_head) == provenance_without_start(head)


def test_sigterm_checkpoints_and_resume_appends(setup, tmp_path):
    bundle, inp = setup
    lines = inp.read_text().splitlines()
    live = tmp_path / "live.csv"
    live.write_text("\n".join(lines[:1001]) + "\n")  # header + 1000 rows so far
    run = tmp_path / "run"
    run.mkdir()
    p = subprocess.Popen(_cmd(bundle, live, run, "--follow", "--checkpoint-every", "0"),
                         stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    last_hop = None
    for line in p.stdout:
        ev = json.loads(line)
        if ev["event"] == "score":
            last_hop = ev["hop"]
        if last_hop == (1000 - 16) // 4:  # every row so far has been scored
            break
    time.sleep(0.3)  # now waiting at end of file (--follow)
    p.send_signal(signal.SIGTERM)
    rest, err = p.communicate(timeout=30)
    assert p.returncode == 0, err
    stop = json.loads(rest.splitlines()[-1])
    assert stop["event"] == "stop" and stop["reason"] == "signal" and stop["signal"] == "SIGTERM"
    assert "not a safety function" in err

    # more rows arrive while it is down; the restart skips what it has and appends the rest
    live.write_text("\n".join(lines) + "\n")
    again = subprocess.run(_cmd(bundle, live, run), capture_output=True, text=True, timeout=60)
    assert again.returncode == 0, again.stderr
    events = [json.loads(x) for x in again.stdout.splitlines()]
    assert events[0]["resumed"] is True
    assert events[-1]["already_processed"] == 1000
    assert sum(events[-1]["errors"].values()) == 0

    base = tmp_path / "base"
    base.mkdir()
    subprocess.run(_cmd(bundle, inp, base), capture_output=True, timeout=60, check=True)
    assert split_scores(run / "scores.csv")[1] == split_scores(base / "scores.csv")[1]
    assert _alerts(run / "alerts.db") == _alerts(base / "alerts.db")
