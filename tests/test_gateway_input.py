"""The gateway's input side (issue 12 items 1, 7, 8, 10; issue 13 section 3): nothing a feed holds
crashes the service, header changes are remapped or refused, `--follow` follows the name like
`tail -F`, empty and useless input is said plainly, a malformed state file is refused cleanly,
and the dialects `ganlet train` reads (separator, quotes, decimal comma, zone, day-first) stream
the same.

References: expected scores from runtime.lstm.Network straight on the bundle's weights
(runtime_fixtures.direct_scores); the workstation's reading of the same file through pandas
(compile/data.load_frame); pandas.Timestamp for zone conversion."""

import copy
import json
import queue
import random
import shutil
import signal
import subprocess
import sys
import threading
import time

import numpy as np
import pandas as pd
import pytest
import runtime_fixtures as fx
from stream_helpers import HEADER, rows_text, run_process, stream, stream_cmd, write_lines

from ganlet.compile.data import IntakeError, IntakeOptions, load_frame
from ganlet.runtime.intake import REJECT_KINDS, format_time
from ganlet.runtime.manifest import BundleError, trained_dialect, validate_manifest

WINDOW, HOP = 16, 4


@pytest.fixture(scope="module")
def bundle_dir(tmp_path_factory):
    return fx.build_bundle(tmp_path_factory.mktemp("input") / "bundle", window=WINDOW, hop=HOP)


def direct(bundle_dir, values):
    return list(fx.direct_scores(bundle_dir, fx.scaled(values), WINDOW, HOP))


def clean_lines(n, seed, start=0):
    values = fx.raw_values(n + start, seed=seed)[start:]
    return values, rows_text(values, fx.T0 + start + np.arange(float(n)))


# ------------------------------------------------------------------------------- item 1: times
ISSUE_TIMES = ["1e15", "1e308", "-1e11", "0001-01-01T00:00+05:00", "9999-12-31T23:59:59-05:00"]


def test_out_of_range_times_are_counted_and_a_restart_does_not_crash(bundle_dir, tmp_path):
    values, lines = clean_lines(120, seed=31)
    dirty = [HEADER]
    for k, line in enumerate(lines):
        dirty.append(line)
        if k % 20 == 10:
            dirty.append(ISSUE_TIMES[(k // 20) % len(ISSUE_TIMES)] + ",40.0,3.0,1.5")
    feed = write_lines(tmp_path / "feed.csv", dirty)
    state = str(tmp_path / "state.json")
    run = run_process(bundle_dir, feed, "--state", state)
    assert run.code == 0 and "Traceback" not in run.err, run.err
    assert run.stop["errors"]["bad_time"] == 6 and run.stop["counters"]["samples"] == 120
    assert run.scores == pytest.approx(direct(bundle_dir, values), rel=1e-5)
    again = run_process(bundle_dir, feed, "--state", state)  # what Restart=always would do
    assert again.code == 0 and again.stop["already_processed"] == 126, again.err


LAYOUTS = [  # header columns and separator a feed may switch to mid-stream
    (["time", "flow", "pressure", "vibration"], ","), (["flow", "time", "vibration", "pressure",
                                                        "site"], ","),
    (["time", "flow", "pressure", "vibration"], ";"), (["time", "flow", "vibration"], ","),
    (["time", "flow", "flow", "pressure", "vibration"], ","),
]


def _render(cols, sep, t, row, quote=False):
    cell = {"time": format_time(t), "site": "north", **{c: repr(float(v)) for (c, _), v in
                                                      zip(fx.CHANNELS, row)}}
    cells = [f'"{cell[c]}"' if quote else cell[c] for c in cols]
    return sep.join(cells)


def _fuzz_lines(rng: random.Random, n: int):
    """Valid rows, mutated rows, header changes, garbage: every way a field feed goes wrong.
    Rows follow the header in force, as a logger that changed its columns would write them."""
    values = fx.raw_values(n, seed=32)
    specials = ISSUE_TIMES + ["nan", "inf", "", "2023-11-14T22:13:20+99:99", "2023-02-30",
                              "10/11/2023", "20231114T221320Z", "2023-W46-2", "１２"]
    cols, sep = LAYOUTS[0]
    for k in range(n):
        good = _render(cols, sep, fx.T0 + k, values[k], quote=rng.random() < 0.05)
        r = rng.random()
        if r < 0.6:
            yield good
        elif r < 0.82:
            yield _mutate(rng, good)
        elif r < 0.86:
            yield good.replace(format_time(fx.T0 + k), rng.choice(specials))
        elif r < 0.87:
            cols, sep = rng.choices(LAYOUTS, weights=[12, 4, 2, 1, 1])[0]
            yield sep.join(cols)
        elif r < 0.94:
            yield "".join(chr(rng.randint(0, 0x2FF)) for _ in range(rng.randint(0, 60)))
        elif r < 0.95:
            yield "9" * rng.choice([10, 400, 70_000])
        else:
            yield rng.choice(["", "  ", ",,,", '"', '"a,b",1,2,3', "\x00\x00" + good])


def _mutate(rng: random.Random, line: str) -> str:
    chars = list(line)
    for _ in range(rng.randint(1, 3)):
        i = rng.randrange(len(chars))
        op = rng.random()
        if op < 0.5:
            chars[i] = rng.choice("0123456789-+:.,eTZ; \"x")
        elif op < 0.7:
            chars.insert(i, rng.choice("0123456789,\""))
        elif op < 0.9:
            del chars[i]
        else:
            chars[i] = chr(ord(chars[i]) ^ (1 << rng.randrange(7)) or 1)  # a bit flip
    return "".join(chars)


def test_fuzzed_feed_ends_cleanly_with_every_line_accounted_for(bundle_dir, tmp_path):
    rng = random.Random(20261202)
    lines = [HEADER] + list(_fuzz_lines(rng, 6000))
    data = ("\n".join(lines) + "\n").encode("utf-8", errors="surrogatepass")
    feed = tmp_path / "fuzz.csv"
    feed.write_bytes(data)
    n_lines = data.count(b"\n") - 1  # after the first header
    run = run_process(bundle_dir, feed, "--state", str(tmp_path / "state.json"),
                      "--scores-out", str(tmp_path / "scores.csv"), timeout=600)
    errors = {k: v for k, v in run.stop["errors"].items() if v}
    print(f"fuzz: {n_lines} lines, exit {run.code}, samples {run.stop['counters']['samples']}, "
          f"headers {run.stop['counters']['header_lines']}, blank "
          f"{run.stop['counters']['blank_lines']}, refused {errors}")
    assert run.code == 0 and "Traceback" not in run.err, run.err[-2000:]
    assert run.stop["counters"]["lines"] == n_lines
    assert run.accounted() == n_lines
    assert set(errors) <= set(REJECT_KINDS) and len(errors) >= 8
    assert run.stop["counters"]["samples"] > 2500 and run.stop["counters"]["hops"] > 300
    # reference: pandas reads the scores CSV back, every value finite
    scores = pd.read_csv(tmp_path / "scores.csv", comment="#")
    assert len(scores) == run.stop["counters"]["hops"] and np.isfinite(scores.score).all()


# --------------------------------------------------------------------- item 7: header changes
def test_a_header_mid_stream_with_the_same_channels_is_remapped(bundle_dir, tmp_path):
    values, lines = clean_lines(120, seed=33)
    order = ["vibration", "flow", "pressure"]
    later = rows_text(values[60:], fx.T0 + 60 + np.arange(60.0), order=order, sep=";")
    feed = write_lines(tmp_path / "h.csv", [HEADER] + lines[:40] + [HEADER] + lines[40:60]
                       + ["site;" + ";".join(["time"] + order)] + ["north;" + x for x in later])
    run = stream(bundle_dir, feed)
    assert run.code == 0, run.err
    (changed,) = run.of("header_changed")
    assert changed["action"] == "remapped" and changed["line"] == 63
    assert run.stop["counters"]["header_lines"] == 2 and sum(run.stop["errors"].values()) == 0
    # every row read in its own header's column order: the scores of the clean series
    assert run.scores == pytest.approx(direct(bundle_dir, values), rel=1e-5)


def test_a_header_lacking_a_channel_refuses_rows_until_a_usable_one(bundle_dir, tmp_path):
    values, lines = clean_lines(120, seed=34)
    partial = [f"{format_time(fx.T0 + 50 + k)},40.0,1.5" for k in range(20)]
    feed = write_lines(tmp_path / "h.csv", [HEADER] + lines[:50] + ["time,flow,vibration"]
                       + partial + [HEADER] + lines[70:])
    run = stream(bundle_dir, feed)
    assert run.code == 0, run.err
    assert [e["action"] for e in run.of("header_changed")] == ["refusing_rows", "remapped"]
    assert "lacks channel(s) ['pressure']" in run.of("header_changed")[0]["problem"]
    assert {k: v for k, v in run.stop["errors"].items() if v} == {"unusable_header": 20}
    want = direct(bundle_dir, values[:50]) + direct(bundle_dir, values[70:])  # a long gap between
    assert run.scores == pytest.approx(want, rel=1e-5)


def test_a_column_named_twice_is_refused(bundle_dir, tmp_path):
    _, lines = clean_lines(20, seed=35)
    feed = write_lines(tmp_path / "d.csv", [HEADER + ",flow"] + [x + ",1" for x in lines])
    run = stream(bundle_dir, feed)
    assert run.code == 2 and "names column(s) ['flow'] more than once" in run.err


# ------------------------------------------------------------------------ item 8: --follow
def _follow(bundle_dir, path, *extra):
    p = subprocess.Popen(stream_cmd(bundle_dir, path, "--follow", *extra),
                         stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    p.events = queue.Queue()  # lines read by a thread, so a quiet stream cannot hang the test
    threading.Thread(target=lambda: [p.events.put(x) for x in p.stdout] + [p.events.put(None)],
                     daemon=True).start()
    return p


def _read_until(p, predicate, timeout=60.0):
    """Events from a running stream until predicate(event) holds."""
    seen, deadline = [], time.monotonic() + timeout
    while True:
        try:
            line = p.events.get(timeout=max(0.0, deadline - time.monotonic()))
        except queue.Empty:
            p.kill()
            raise AssertionError(f"no such event within {timeout} s; last: {seen[-3:]}") from None
        assert line is not None, f"stream ended first: {p.stderr.read()[-2000:]}"
        seen.append(json.loads(line))
        if predicate(seen[-1]):
            return seen


def _stop(p):
    p.send_signal(signal.SIGTERM)
    p.wait(timeout=30)
    assert p.returncode == 0, p.stderr.read()
    out = []
    while (line := p.events.get(timeout=10)) is not None:
        out.append(json.loads(line))
    return out


def _score_at(t):
    return lambda e: e["event"] == "score" and e["time"] == format_time(t)


@pytest.mark.parametrize("how", ["truncated", "renamed"])
def test_follow_reads_on_after_rotation(bundle_dir, tmp_path, how):
    values, lines = clean_lines(300, seed=36)
    live = write_lines(tmp_path / "live.csv", [HEADER] + lines[:100])
    p = _follow(bundle_dir, live)
    events = _read_until(p, _score_at(fx.T0 + 99))
    time.sleep(0.5)  # the follower waits at the end of the file, as it does between rows
    if how == "truncated":  # logrotate copytruncate: copy aside, cut to 0, the writer goes on
        shutil.copy(live, tmp_path / "live.csv.1")
        with open(live, "r+") as fh:
            fh.truncate(0)
        with open(live, "a") as fh:
            fh.write("\n".join(lines[100:]) + "\n")
    else:  # rename rotation: the writer starts a new file (with its header) under the name
        live.rename(tmp_path / "live.csv.1")
        write_lines(live, [HEADER] + lines[100:])
    events += _read_until(p, _score_at(fx.T0 + 299))
    events += _stop(p)
    (rotated,) = [e for e in events if e["event"] == "input_rotated"]
    assert rotated["how"] == how
    stop = events[-1]
    assert stop["counters"]["samples"] == 300 and sum(stop["errors"].values()) == 0
    scores = [e["score"] for e in events if e["event"] == "score"]
    assert scores == pytest.approx(direct(bundle_dir, values), rel=1e-5)


def test_follow_waits_for_an_input_that_does_not_exist_yet(bundle_dir, tmp_path):
    values, lines = clean_lines(60, seed=37)
    live = tmp_path / "later.csv"
    p = _follow(bundle_dir, live)
    events = _read_until(p, lambda e: e["event"] == "input_waiting")
    assert events[-1]["input"] == str(live)
    time.sleep(0.5)
    assert p.poll() is None  # still running: no exit 3 into a restart loop
    write_lines(live, [HEADER] + lines)
    events += _read_until(p, _score_at(fx.T0 + 59))
    events += _stop(p)
    assert events[-1]["counters"]["samples"] == 60


# -------------------------------------------------------------- item 10: plain words, exit codes
@pytest.mark.parametrize("text, said", [
    ("", "the input is empty (no header line)"),
    ("\n\n  \n", "the input is empty (no header line)"),
    (HEADER + "\n", "the input has a header but no data rows"),
    (HEADER + "\n\n\n", "the input has a header but no data rows"),
])
def test_empty_input_is_said_plainly(bundle_dir, tmp_path, text, said):
    (tmp_path / "in.csv").write_text(text)
    run = stream(bundle_dir, tmp_path / "in.csv")
    assert run.code == 5 and said in run.err


def test_a_stream_that_refused_every_row_does_not_exit_0(bundle_dir, tmp_path):
    _, lines = clean_lines(30, seed=38)
    # every channel cell text (one text cell alone is read as a blank: tests/test_blanks.py)
    feed = write_lines(tmp_path / "bad.csv", [HEADER] + [x.replace(",", ",x") for x in lines])
    run = stream(bundle_dir, feed)
    assert run.code == 5
    assert "all 30 data rows were refused (non_numeric 30); first: line 2: non_numeric" in run.err


def _state_paths(node, path=()):
    """Every place in a JSON tree: dict keys and list items (the first three of a list)."""
    yield path
    if isinstance(node, dict):
        for k, v in node.items():
            yield from _state_paths(v, path + (k,))
    elif isinstance(node, list):
        for i, v in enumerate(node[:3]):
            yield from _state_paths(v, path + (i,))


def _replace(tree, path, value):
    tree = copy.deepcopy(tree)
    if not path:
        return value
    node = tree
    for key in path[:-1]:
        node = node[key]
    node[path[-1]] = value
    return tree


def _damaged_state_codes(bundle, feed, state, doc, under, last_bad) -> dict:
    """Each place under `under` in the saved state replaced by each bad value in turn, streamed
    on: exit codes counted; only 0 (harmless) or 3 (refused, saying so) are allowed."""
    node = doc["state"]
    for key in under:
        node = node[key]
    codes = {}
    for path in _state_paths(node):
        for bad in (None, "x", -1, 1e308, [], {}, [[1, 2]], last_bad):
            state.write_text(json.dumps(dict(doc, state=_replace(doc["state"], under + path, bad))))
            try:
                run = stream(bundle, feed, "--state", str(state))
            except Exception as exc:  # noqa: BLE001 - any escape is the failure under test
                pytest.fail(f"state{list(under + path)} = {bad!r}: {type(exc).__name__}: {exc}")
            assert run.code in (0, 3), (under + path, bad, run.err)
            if run.code == 3:
                assert "state cannot be restored" in run.err or "malformed" in run.err
            codes[run.code] = codes.get(run.code, 0) + 1
    return codes


def test_a_malformed_state_file_exits_3_never_a_traceback(bundle_dir, tmp_path):
    values = fx.raw_values(80, seed=39, anomalies=[(50, 30, 1, 9.0)])  # an alert open at the end
    feed = write_lines(tmp_path / "feed.csv", [HEADER] + rows_text(values, fx.T0 + np.arange(80.0)))
    state = tmp_path / "state.json"
    assert stream(bundle_dir, feed, "--state", str(state)).code == 0
    doc = json.loads(state.read_text())
    assert doc["state"]["detector"]["judge"]["alert"] is not None  # precondition: an open alert
    more = write_lines(tmp_path / "more.csv", [HEADER] + rows_text(
        fx.raw_values(120, seed=39)[80:], fx.T0 + 80 + np.arange(40.0)))
    codes = _damaged_state_codes(bundle_dir, more, state, doc, (), True)
    print(f"malformed states: {codes}")
    assert codes[3] > 100  # most damage is refused, the rest was harmless and ran


def test_a_malformed_drift_state_exits_3_never_a_traceback(tmp_path):
    """The same damage to the drift monitor's part of the state, on a bundle that watches
    drift (compiled bundles do by default): refused at start, not a crash mid-stream."""
    n = len(fx.CHANNELS)
    drift = {"lo": [-1.0] * n, "hi": [1.0] * n, "v_max": [3.0] * n, "action": "recentre"}
    bundle = fx.build_bundle(tmp_path / "bundle", window=WINDOW, hop=HOP, drift=drift,
                             threshold={"kind": "static", "level": 1e9})  # no alert blocks it
    values = fx.raw_values(120, seed=41)
    values[:, 0] += fx.SCALE[0] * np.linspace(0.0, 4.0, 120)  # leaves its range slowly
    feed = write_lines(tmp_path / "feed.csv",
                       [HEADER] + rows_text(values[:80], fx.T0 + np.arange(80.0)))
    state = tmp_path / "state.json"
    assert stream(bundle, feed, "--state", str(state)).code == 0
    doc = json.loads(state.read_text())
    assert any(doc["state"]["detector"]["drift"]["in_drift"])  # precondition: a drift under way
    more = write_lines(tmp_path / "more.csv",
                       [HEADER] + rows_text(values[80:], fx.T0 + 80 + np.arange(40.0)))
    codes = _damaged_state_codes(bundle, more, state, doc, ("detector", "drift"), [True] * (n + 1))
    print(f"malformed drift states: {codes}")
    assert codes[3] > 50


def test_a_malformed_cusum_state_exits_3_never_a_traceback(tmp_path):
    """The CUSUM's evidence in a saved state (runtime/cusum.py), damaged: refused at start."""
    calibration = fx.direct_scores(fx.build_bundle(tmp_path / "probe", onnx_model=False),
                                   fx.scaled(fx.raw_values(600, seed=99)), WINDOW, HOP)
    median = float(np.median(calibration))
    bundle = fx.build_bundle(tmp_path / "bundle", window=WINDOW, hop=HOP, threshold={
        "kind": "static", "level": 1e9,
        "cusum": {"median": median, "allowance": 0.1, "limit": 1e6}})  # gathers, never alerts
    values = fx.raw_values(120, seed=42, anomalies=[(40, 80, 1, 3.0)])
    feed = write_lines(tmp_path / "feed.csv",
                       [HEADER] + rows_text(values[:80], fx.T0 + np.arange(80.0)))
    state = tmp_path / "state.json"
    assert stream(bundle, feed, "--state", str(state)).code == 0
    doc = json.loads(state.read_text())
    assert doc["state"]["detector"]["judge"]["cusum"] > 0  # precondition: evidence gathered
    more = write_lines(tmp_path / "more.csv",
                       [HEADER] + rows_text(values[80:], fx.T0 + 80 + np.arange(40.0)))
    codes = _damaged_state_codes(bundle, more, state, doc, ("detector", "judge", "cusum"), 3e6)
    print(f"malformed CUSUM states: {codes}")
    assert codes.get(0, 0) == 1 and codes[3] == 7  # only null (an older state: from 0) runs


# ----------------------------------------------------- issue 13 section 3: dialects and zones
def _berlin_local(t: float) -> str:
    # reference: pandas converts UTC to Europe/Berlin wall-clock time
    return pd.Timestamp(t, unit="s", tz="UTC").tz_convert("Europe/Berlin").strftime(
        "%Y-%m-%d %H:%M:%S")


def test_a_semicolon_decimal_comma_local_time_file_streams_and_trains_alike(bundle_dir, tmp_path):
    values, lines = clean_lines(100, seed=40)
    plain = stream(bundle_dir, write_lines(tmp_path / "plain.csv", [HEADER] + lines))
    times = fx.T0 + np.arange(100.0)
    local = ['"time";"flow";"pressure";"vibration";"note"'] + [
        ";".join([_berlin_local(t)] + [format(v, ".17g").replace(".", ",") for v in row]
                 + ['"ok; checked"']) for t, row in zip(times, values)]
    feed = write_lines(tmp_path / "local.csv", local)
    run = stream(bundle_dir, feed, "--decimal", ",", "--tz", "Europe/Berlin")
    assert run.code == 0, run.err
    assert run.of("start")[0]["input"]["time_zone"] == "Europe/Berlin"
    assert run.score_times == plain.score_times and run.scores == plain.scores
    # the workstation reads the same file to the same times and values (pandas under it)
    frame = load_frame(feed, IntakeOptions(decimal=",", tz="Europe/Berlin",
                                           channels=["flow", "pressure", "vibration"]))
    assert (frame.times == pd.to_datetime(times, unit="s")).all()
    np.testing.assert_array_equal(frame.values, values)
    assert frame.report.time_zone == "Europe/Berlin"
    # without --decimal both sides say what to do
    assert "--decimal ," in stream(bundle_dir, feed, "--tz", "Europe/Berlin").err
    with pytest.raises(IntakeError, match="--decimal ','"):
        load_frame(feed, IntakeOptions(tz="Europe/Berlin"))



def test_a_local_time_feed_through_the_hour_clocks_go_back_streams_and_trains_alike(
        bundle_dir, tmp_path):
    # Europe/Berlin went back from 03:00 CEST to 02:00 CET at 2024-10-27T01:00Z (reference:
    # pandas' zone data in _berlin_local). 240 rows a second around it, in wall-clock time:
    # 02:58:00 .. 02:59:59, then 02:00:00 .. 02:01:59 again. Before, the gateway restarted its
    # clock at the step back, then saw an hour's gap (a window reset); training averaged the
    # two passes together.
    utc = pd.Timestamp("2024-10-27T00:58:00Z").timestamp() + np.arange(240.0)
    values, _ = clean_lines(240, seed=41)
    plain = stream(bundle_dir, write_lines(tmp_path / "plain.csv",
                                           [HEADER] + rows_text(values, utc)))
    local = [HEADER] + [",".join([_berlin_local(t)] + [repr(float(v)) for v in row])
                        for t, row in zip(utc, values)]
    assert local[121].split(",")[0] == "2024-10-27 02:00:00"   # the second pass begins
    feed = write_lines(tmp_path / "local.csv", local)
    run = stream(bundle_dir, feed, "--tz", "Europe/Berlin")
    assert run.code == 0, run.err
    assert not run.of("time_jump") and not run.of("gap")
    assert run.score_times == plain.score_times and run.scores == plain.scores
    # stopped inside the second pass and resumed on the same file: the same scores
    state = tmp_path / "state"
    write_lines(feed, local[:150])
    first = stream(bundle_dir, feed, "--tz", "Europe/Berlin", "--state", str(state))
    write_lines(feed, local)
    rest = stream(bundle_dir, feed, "--tz", "Europe/Berlin", "--state", str(state))
    assert not first.of("time_jump") + rest.of("time_jump")
    assert first.score_times + rest.score_times == plain.score_times
    assert first.scores + rest.scores == plain.scores
    # the workstation reads the file to the same instants, none averaged, no gap
    frame = load_frame(feed, IntakeOptions(tz="Europe/Berlin",
                                           channels=["flow", "pressure", "vibration"]))
    assert (frame.times == pd.to_datetime(utc, unit="s")).all()
    assert frame.report.duplicates == 0 and not frame.report.long_gaps



def test_a_windows_1252_file_streams_and_trains_alike_and_utf16_is_refused(bundle_dir, tmp_path):
    # Spreadsheets and SCADA tools on Windows write CSV in Windows-1252: a note column
    # 'Störung' and a unit '°C' are bytes 0xF6 and 0xB0, not UTF-8. Before, the gateway refused
    # every such row (bad_encoding) and training failed with "try --sep". Reference: Python's
    # own cp1252 codec (the Windows-1252 table) encodes the file.
    values, lines = clean_lines(80, seed=42)
    plain = stream(bundle_dir, write_lines(tmp_path / "plain.csv", [HEADER] + lines))
    text = "\n".join([HEADER + ",Bemerkung"] + [line + ",Störung 5 °C" for line in lines]) + "\n"
    feed = tmp_path / "windows.csv"
    feed.write_bytes(text.encode("cp1252"))
    run = stream(bundle_dir, feed)
    assert run.code == 0 and not any(run.stop["errors"].values()), run.stop
    assert run.scores == plain.scores
    named = tmp_path / "named.csv"
    named.write_bytes(text.replace("flow", "Durchfluss °C").encode("cp1252"))
    with pytest.warns(UserWarning, match="not UTF-8: lines read as Windows-1252"):
        frame = load_frame(named)
    assert frame.channels == ["Durchfluss °C", "pressure", "vibration"]
    np.testing.assert_array_equal(frame.values, values)
    # UTF-16 (byte-order mark first) is said plainly on both sides
    wide = tmp_path / "wide.csv"
    wide.write_bytes(text.encode("utf-16"))
    with pytest.raises(IntakeError, match="UTF-16; save it as UTF-8"):
        load_frame(wide)
    assert "UTF-16" in stream(bundle_dir, wide).err



def test_spaces_after_the_separators_name_the_same_columns_on_both_sides(bundle_dir, tmp_path):
    # 'time, flow, pressure' (a space after each comma, as many tools write): the gateway strips
    # each header cell; training kept ' flow', so the bundle refused the header of the very
    # file it was trained on (input header lacks channel(s) [' flow', ...]).
    values, lines = clean_lines(60, seed=43)
    plain = stream(bundle_dir, write_lines(tmp_path / "plain.csv", [HEADER] + lines))
    feed = write_lines(tmp_path / "spaced.csv", [HEADER.replace(",", ", ")]
                       + [line.replace(",", ", ") for line in lines])
    run = stream(bundle_dir, feed)
    assert run.code == 0 and run.scores == plain.scores
    frame = load_frame(feed)
    assert frame.channels == ["flow", "pressure", "vibration"]
    np.testing.assert_array_equal(frame.values, values)


def test_the_bundle_zone_is_the_default(tmp_path):
    bundle = fx.build_bundle(tmp_path / "berlin", window=WINDOW, hop=HOP, onnx_model=False,
                             time_zone="Europe/Berlin")
    values, lines = clean_lines(60, seed=41)
    plain = stream(bundle, write_lines(tmp_path / "plain.csv", [HEADER] + lines))
    local = [HEADER] + [_berlin_local(fx.T0 + k) + "," + x.split(",", 1)[1]
                        for k, x in enumerate(lines)]
    run = stream(bundle, write_lines(tmp_path / "local.csv", local))
    assert run.code == 0 and run.score_times == plain.score_times
    assert all(t.endswith("Z") for t in run.score_times)  # events stay UTC
    utc = stream(bundle, tmp_path / "local.csv", "--tz", "UTC")  # the option overrides it
    assert pd.Timestamp(utc.score_times[0]) - pd.Timestamp(plain.score_times[0]) == \
        pd.Timedelta("1h")


def test_day_first_dates_are_refused_unless_told(bundle_dir, tmp_path):
    values, lines = clean_lines(60, seed=42)
    plain = stream(bundle_dir, write_lines(tmp_path / "plain.csv", [HEADER] + lines))
    dmy = [HEADER] + [pd.Timestamp(fx.T0 + k, unit="s").strftime("%d/%m/%Y %H:%M:%S") + ","
                      + x.split(",", 1)[1] for k, x in enumerate(lines)]
    feed = write_lines(tmp_path / "dmy.csv", dmy)
    run = stream(bundle_dir, feed)
    assert run.code == 5 and "--dayfirst" in run.err
    told = stream(bundle_dir, feed, "--dayfirst")
    assert told.code == 0 and told.scores == plain.scores
    with pytest.raises(IntakeError, match="--dayfirst"):
        load_frame(feed)
    frame = load_frame(feed, IntakeOptions(date_order="dayfirst"))
    assert frame.times[0] == pd.Timestamp(fx.T0, unit="s")


def test_the_training_datas_decimal_mark_and_date_order_are_the_defaults(tmp_path):
    # trained on a semicolon, decimal-comma, day-first export, the bundle reads the same export
    # with no flags (it had refused every row until --decimal , --dayfirst were given again);
    # reference: the cells are written by strftime("%d/%m/%Y ...") and str.replace of the point
    bundle = fx.build_bundle(tmp_path / "eu", window=WINDOW, hop=HOP, onnx_model=False,
                             dialect={"decimal_mark": ",", "date_order": "dayfirst"})
    manifest = json.loads((bundle / "manifest.json").read_text())
    assert (manifest["decimal_mark"], manifest["date_order"]) == (",", "dayfirst")
    values, lines = clean_lines(60, seed=44)
    plain = stream(bundle, write_lines(tmp_path / "plain.csv", [HEADER] + lines))
    eu = [HEADER.replace(",", ";")] + [
        pd.Timestamp(fx.T0 + k, unit="s").strftime("%d/%m/%Y %H:%M:%S") + ";"
        + ";".join(x.split(",")[1:]).replace(".", ",") for k, x in enumerate(lines)]
    feed = write_lines(tmp_path / "eu.csv", eu)
    run = stream(bundle, feed)
    assert run.code == 0 and run.scores == plain.scores and run.score_times == plain.score_times
    assert stream(bundle, feed, "--monthfirst").code == 5  # an option overrides the bundle
    check = subprocess.run([sys.executable, str(bundle / "run.py"), "check"],
                           capture_output=True, text=True)
    assert "decimal mark ',', dates such as 02/03/2026 read day first" in check.stdout
    assert stream(bundle, feed, "--decimal", ".").code == 5
    # a manifest from before the keys: numbers with a point, the date order asked for
    older = {k: v for k, v in manifest.items() if k not in ("decimal_mark", "date_order")}
    validate_manifest(older)
    assert trained_dialect(older) == {"tz": "UTC", "decimal": ".", "date_order": None}
    for bad in ({"decimal_mark": ";"}, {"date_order": "yearfirst"}, {"times_from_rows": "yes"}):
        with pytest.raises(BundleError, match=next(iter(bad))):
            validate_manifest({**manifest, **bad})


def test_a_spreadsheets_separator_line_is_skipped_and_names_the_separator(bundle_dir, tmp_path):
    # `sep=;` above the header (a spreadsheet's way to name the separator): the stream had
    # stopped with bad_header; training reads such a file too (test_real_world_files)
    values, lines = clean_lines(60, seed=45)
    plain = stream(bundle_dir, write_lines(tmp_path / "plain.csv", [HEADER] + lines))
    semi = ["sep=;", HEADER.replace(",", ";")] + [x.replace(",", ";") for x in lines]
    run = stream(bundle_dir, write_lines(tmp_path / "semi.csv", semi))
    assert run.code == 0 and run.scores == plain.scores
    # a --sep given wins: the line is still skipped, and the rows are read with it
    assert stream(bundle_dir, tmp_path / "semi.csv", "--sep", ";").scores == plain.scores
    late = [HEADER] + lines[:5] + ["sep=;"] + lines[5:]  # only a first line is a directive
    run = stream(bundle_dir, write_lines(tmp_path / "late.csv", late))
    assert run.code == 0 and sum(run.stop["errors"].values()) == 1  # refused as a row


def test_bad_dialect_options_exit_2(bundle_dir, tmp_path):
    _, lines = clean_lines(20, seed=43)
    feed = write_lines(tmp_path / "f.csv", [HEADER] + lines)
    for bad, said in ((("--tz", "Mars/Base"), "unknown here"),
                      (("--sep", ",", "--decimal", ","), "both ','")):
        run = stream(bundle_dir, feed, *bad)
        assert run.code == 2 and said in run.err
