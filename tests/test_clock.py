"""Clock faults (issue 12 item 2): rows are judged against a plausible clock, a lone jump never
captures the timeline, a real clock change is believed after confirmation with an event of its
own, and a refused or unconfirmed time never reaches the checkpoint.

The expected scores come from runtime.lstm.Network straight on the bundle's weights
(runtime_fixtures.direct_scores), the reference the stream tests already use."""

import ast
import json
import signal
import subprocess
import time
from pathlib import Path

import numpy as np
import pytest
import runtime_fixtures as fx
from stream_helpers import (
    HEADER,
    rows_text,
    run_process,
    scores_rows,
    stream,
    stream_cmd,
    write_lines,
)

from ganlet.runtime import service
from ganlet.runtime.intake import format_time

WINDOW, HOP = 16, 4
YEAR = 365 * 86400.0


@pytest.fixture(scope="module")
def bundle_dir(tmp_path_factory):
    return fx.build_bundle(tmp_path_factory.mktemp("clock") / "bundle", window=WINDOW, hop=HOP)


def direct(bundle_dir, values):
    return list(fx.direct_scores(bundle_dir, fx.scaled(values), WINDOW, HOP))


def saved_last_time(state: Path):
    return json.loads(state.read_text())["state"]["detector"]["last_time"]


def test_lone_rows_dated_wrong_are_refused_and_do_not_capture_the_timeline(bundle_dir, tmp_path):
    values = fx.raw_values(200, seed=21)
    times = fx.T0 + np.arange(200.0)
    lines = rows_text(values, times)
    odd = {  # after data row k: a lone row with a wrong time (a typo, a bit flip, a stale row)
        50: fx.T0 + 50.5 + 10 * YEAR,  # year 2033: later than the gateway clock
        80: fx.T0 + 80.5 + 2 * YEAR,  # year 2025: plausible, but nothing follows it
        120: fx.T0 + 120 + 2 ** 26,  # bit 26 of the epoch seconds flipped
        150: fx.T0 - 86400.0,  # a day behind
    }
    dirty = [HEADER]
    for k, line in enumerate(lines):
        dirty.append(line)
        if k in odd:
            dirty.append(format_time(odd[k]) + ",40.0,3.0,1.5")
    run = stream(bundle_dir, write_lines(tmp_path / "dirty.csv", dirty), "--state",
                 str(tmp_path / "state.json"))
    assert run.code == 0, run.err
    errors = {k: v for k, v in run.stop["errors"].items() if v}
    assert errors == {"ahead_of_clock": 1, "time_jump": 2, "out_of_order": 1}
    assert run.stop["counters"]["samples"] == 200 and run.of("time_jump") == []
    assert run.scores == pytest.approx(direct(bundle_dir, values), rel=1e-5)  # as if clean
    assert saved_last_time(tmp_path / "state.json") == times[-1]


def test_a_clock_set_back_is_believed_after_confirmation_and_detection_goes_on(bundle_dir,
                                                                                  tmp_path):
    values = fx.raw_values(200, seed=22)
    times = np.concatenate([fx.T0 + np.arange(100.0), fx.T0 - 3000 + np.arange(100.0)])
    run = stream(bundle_dir, write_lines(tmp_path / "back.csv",
                                         [HEADER] + rows_text(values, times)))
    assert run.code == 0, run.err
    jumps = run.of("time_jump")
    assert len(jumps) == 1
    assert jumps[0]["direction"] == "backward" and jumps[0]["action"] == "clock_restarted"
    assert jumps[0]["what"] == "the feed's clock was set back"
    assert jumps[0]["from"] == format_time(times[99]) and jumps[0]["to"] == format_time(times[100])
    assert jumps[0]["confirmed_by_rows"] == 10 and jumps[0]["shift_s"] == -3099.0
    assert sum(run.stop["errors"].values()) == 0 and run.stop["counters"]["samples"] == 200
    # the window restarts on the new timeline: scores of each part on its own
    want = direct(bundle_dir, values[:100]) + direct(bundle_dir, values[100:])
    assert run.scores == pytest.approx(want, rel=1e-5)
    assert run.score_times[-1] == format_time(times[-1])


def test_a_clock_set_forward_is_a_confirmed_jump_and_a_window_reset(bundle_dir, tmp_path):
    values = fx.raw_values(160, seed=23)
    times = np.concatenate([fx.T0 + np.arange(80.0), fx.T0 + 7 * 86400 + np.arange(80.0)])
    run = stream(bundle_dir, write_lines(tmp_path / "fwd.csv", [HEADER] + rows_text(values, times)))
    assert run.code == 0, run.err
    (jump,) = run.of("time_jump")
    assert jump["direction"] == "forward" and jump["action"] == "window_reset"
    assert jump["to"] == format_time(times[80])
    assert len(run.of("gap")) == 1
    want = direct(bundle_dir, values[:80]) + direct(bundle_dir, values[80:])
    assert run.scores == pytest.approx(want, rel=1e-5)


def test_a_jump_not_yet_confirmed_stays_out_of_the_checkpoint(bundle_dir, tmp_path):
    """--follow: rows of a new timeline are held when SIGTERM comes; the checkpoint keeps the
    old timeline; after a restart more rows confirm the jump and nothing is lost or doubled."""
    values = fx.raw_values(150, seed=24)
    times = np.concatenate([fx.T0 + np.arange(100.0), fx.T0 + 30 * 86400 + np.arange(50.0)])
    lines = [HEADER] + rows_text(values, times)
    live = write_lines(tmp_path / "live.csv", lines[:105])  # 100 rows + 4 of the new timeline
    state, scores = tmp_path / "state.json", tmp_path / "scores.csv"
    extra = ("--state", str(state), "--scores-out", str(scores))
    p = subprocess.Popen(stream_cmd(bundle_dir, live, "--follow", "--checkpoint-every", "0.05",
                                    *extra), stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                         text=True)
    for line in p.stdout:
        if json.loads(line).get("time") == format_time(times[99]):
            break
    time.sleep(0.6)  # at end of file now, several timed checkpoints written
    assert saved_last_time(state) == times[99]
    p.send_signal(signal.SIGTERM)
    rest, err = p.communicate(timeout=30)
    stop = json.loads(rest.splitlines()[-1])
    assert p.returncode == 0 and stop["reason"] == "signal", err
    assert stop["held_rows"] == 4 and sum(stop["errors"].values()) == 0
    assert saved_last_time(state) == times[99]  # the held times are not in it

    write_lines(live, lines)
    again = run_process(bundle_dir, live, *extra)
    assert again.code == 0, again.err
    assert again.stop["already_processed"] == 100 and sum(again.stop["errors"].values()) == 0
    assert [j["direction"] for j in again.of("time_jump")] == ["forward"]
    assert run_process(bundle_dir, live, "--scores-out", str(tmp_path / "once.csv")).code == 0
    assert scores_rows(scores) == scores_rows(tmp_path / "once.csv")


def test_an_unconfirmed_jump_at_the_end_of_a_file_is_refused(bundle_dir, tmp_path):
    values = fx.raw_values(101, seed=25)
    times = np.append(fx.T0 + np.arange(100.0), fx.T0 + 2 * YEAR)
    state = tmp_path / "state.json"
    run = stream(bundle_dir, write_lines(tmp_path / "end.csv", [HEADER] + rows_text(values, times)),
                 "--state", str(state))
    assert run.code == 0 and run.stop["errors"]["time_jump"] == 1
    assert "input ended first" in run.of("input_error")[-1]["example"]["detail"]
    assert saved_last_time(state) == times[99]


def test_a_checkpoint_poisoned_by_an_older_runtime_recovers(bundle_dir, tmp_path):
    """Earlier runtimes could save a lone future time; the restart then skipped every real row
    as already processed. Now those rows are a confirmed backward jump and detection goes on."""
    values = fx.raw_values(200, seed=26)
    lines = [HEADER] + rows_text(values, fx.T0 + np.arange(200.0))
    state = tmp_path / "state.json"
    first = stream(bundle_dir, write_lines(tmp_path / "feed.csv", lines[:101]), "--state",
                   str(state))
    assert first.code == 0
    doc = json.loads(state.read_text())
    doc["state"]["detector"]["last_time"] = fx.T0 + 10 * YEAR
    state.write_text(json.dumps(doc))
    run = stream(bundle_dir, write_lines(tmp_path / "feed.csv", lines), "--state", str(state))
    assert run.code == 0, run.err
    assert run.stop["already_processed"] == 100
    assert [j["direction"] for j in run.of("time_jump")] == ["backward"]
    assert run.stop["counters"]["samples"] == 200  # 100 before, 100 now: none skipped
    assert saved_last_time(state) == fx.T0 + 199


def test_a_restart_resumes_exactly_after_a_clock_set_back(bundle_dir, tmp_path):
    """Resuming by time cannot work once the times go back; the position in the file can."""
    values = fx.raw_values(250, seed=27)
    times = np.concatenate([fx.T0 + np.arange(100.0), fx.T0 - 3000 + np.arange(150.0)])
    lines = [HEADER] + rows_text(values, times)
    feed = tmp_path / "feed.csv"
    extra = ("--state", str(tmp_path / "state.json"), "--scores-out", str(tmp_path / "s.csv"),
             "--alert-db", str(tmp_path / "a.db"))
    assert stream(bundle_dir, write_lines(feed, lines[:161]), *extra).code == 0
    run = stream(bundle_dir, write_lines(feed, lines), *extra)
    assert run.code == 0 and run.stop["already_processed"] == 160
    assert sum(run.stop["errors"].values()) == 0 and run.of("time_jump") == []
    once = stream(bundle_dir, feed, "--scores-out", str(tmp_path / "once.csv"))
    assert once.code == 0
    assert scores_rows(tmp_path / "s.csv") == scores_rows(tmp_path / "once.csv")


def test_rows_are_judged_against_the_gateway_clock_and_the_bundle_date(bundle_dir, tmp_path,
                                                                       monkeypatch):
    values = fx.raw_values(60, seed=28)
    old = write_lines(tmp_path / "old.csv",
                      [HEADER] + rows_text(values, fx.T0 - 60 * 86400 + np.arange(60.0)))
    run = stream(bundle_dir, old)
    assert run.code == 5 and run.stop["errors"]["before_bundle"] == 60
    assert "--replay" in run.err
    assert stream(bundle_dir, old, "--replay").code == 0
    assert stream(bundle_dir, old, "--backlog-days", "90").code == 0

    feed = write_lines(tmp_path / "feed.csv",
                       [HEADER] + rows_text(values, fx.T0 + np.arange(60.0)))
    monkeypatch.setattr(service, "wall_clock", lambda: fx.T0 - 1000.0)  # 16 min behind the rows
    run = stream(bundle_dir, feed)
    assert run.code == 5 and run.stop["errors"]["ahead_of_clock"] == 60
    assert stream(bundle_dir, feed, "--max-ahead", "1200").code == 0

    # a gateway clock before any plausible row (no battery-backed clock, not yet set)
    monkeypatch.setattr(service, "wall_clock", lambda: 946684800.0)  # 2000-01-01
    run = stream(bundle_dir, feed)
    assert run.code == 0 and run.stop["counters"]["samples"] == 60
    (suspect,) = run.of("clock_suspect")
    assert suspect["gateway_clock"] == "2000-01-01T00:00:00Z"


def test_the_detector_reads_no_clock():
    """The per-sample detector stays pure: the service passes it times, never the wall clock."""
    tree = ast.parse((Path(fx.RUNTIME_DIR) / "detector.py").read_text())
    imported = {alias.name.split(".")[0] for node in ast.walk(tree)
                if isinstance(node, (ast.Import, ast.ImportFrom))
                for alias in node.names} | {node.module.split(".")[0] for node in ast.walk(tree)
                                            if isinstance(node, ast.ImportFrom) and node.module}
    assert not imported & {"time", "datetime", "calendar", "clock"}
    assert "wall_clock" not in (Path(fx.RUNTIME_DIR) / "detector.py").read_text()


def test_jump_settings_are_checked(bundle_dir, tmp_path):
    feed = write_lines(tmp_path / "f.csv", [HEADER] + rows_text(fx.raw_values(20), fx.T0 +
                                                                 np.arange(20.0)))
    for bad in (("--confirm-rows", "1"), ("--max-ahead", "-5")):
        run = stream(bundle_dir, feed, *bad)
        assert run.code == 2 and "--confirm-rows >= 2" in run.err
