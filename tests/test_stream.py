"""The streaming service on a tiny real bundle: one score per hop, bad input, gaps, backends."""

import contextlib
import io
import json

import numpy as np
import pandas as pd
import pytest
import runtime_fixtures as fx

from ganlet.runtime.cli import main
from ganlet.runtime.intake import REJECT_KINDS, format_time
from ganlet.runtime.manifest import BundleError, load_bundle
from ganlet.runtime.score import ScoreRule
from ganlet.runtime.scorer import make_scorer

WINDOW, HOP = 16, 4


@pytest.fixture(scope="module")
def bundle_dir(tmp_path_factory):
    return fx.build_bundle(tmp_path_factory.mktemp("b") / "bundle", window=WINDOW, hop=HOP)


def stream(bundle_dir, csv_path, tmp_path, *extra, tag="run"):
    """Run `stream` in-process; returns (events, scores DataFrame via pandas, stderr text)."""
    scores = tmp_path / f"{tag}-scores.csv"
    out, err = io.StringIO(), io.StringIO()
    argv = ["stream", "--input", str(csv_path), "--scores-out", str(scores),
            "--heartbeat", "0", *extra]
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main(argv, bundle_dir=bundle_dir)
    assert code == 0, err.getvalue()
    events = [json.loads(line) for line in out.getvalue().splitlines()]
    # reference: pandas.read_csv parses the scores file (external reader of our CSV), past the
    # `#` provenance lines at its top
    df = pd.read_csv(scores, comment="#")
    return events, df, err.getvalue()


def of(events, name):
    return [e for e in events if e["event"] == name]


def test_clean_stream_one_score_per_hop(bundle_dir, tmp_path):
    n = 203
    values = fx.raw_values(n)
    fx.write_csv(tmp_path / "clean.csv", values)
    events, df, err = stream(bundle_dir, tmp_path / "clean.csv", tmp_path, "--backend", "numpy")

    n_hops = (n - WINDOW) // HOP + 1
    assert len(df) == n_hops and list(df.columns) == ["time", "score", "threshold", "alert"]
    # window k ends at sample WINDOW-1 + k*HOP: that sample's time labels the score
    ends = fx.T0 + (WINDOW - 1) + HOP * np.arange(n_hops)
    # reference: pandas.to_datetime parses the ISO 8601 times we wrote
    assert (pd.to_datetime(df.time, utc=True) == pd.to_datetime(ends, unit="s", utc=True)).all()
    direct = fx.direct_scores(bundle_dir, fx.scaled(values), WINDOW, HOP)
    np.testing.assert_allclose(df.score.to_numpy(), direct, rtol=1e-5, atol=0)
    level = load_bundle(bundle_dir).threshold_policy["level"]
    np.testing.assert_allclose(df.threshold.to_numpy(), level, rtol=1e-7)
    assert set(df.alert.unique()) <= {0, 1}

    assert events[0]["event"] == "start" and "not a safety function" in events[0]["notice"]
    assert "not a safety function" in err and "interlocks" in err
    assert len(of(events, "score")) == n_hops
    assert [e["hop"] for e in of(events, "score")] == list(range(n_hops))
    stop = events[-1]
    assert stop["event"] == "stop" and stop["reason"] == "end_of_input"
    assert stop["counters"]["samples"] == n and stop["counters"]["hops"] == n_hops
    assert sum(stop["errors"].values()) == 0


def test_score_thinning_keeps_every_row_in_csv(bundle_dir, tmp_path):
    fx.write_csv(tmp_path / "c.csv", fx.raw_values(120))
    events, df, _ = stream(bundle_dir, tmp_path / "c.csv", tmp_path, "--backend", "numpy",
                           "--score-every", "5")
    hops = [e["hop"] for e in of(events, "score")]
    assert hops == list(range(0, len(df), 5))
    events0, df0, _ = stream(bundle_dir, tmp_path / "c.csv", tmp_path, "--backend", "numpy",
                             "--score-every", "0", tag="none")
    assert of(events0, "score") == [] and df0.equals(df)


def test_columns_any_order_extra_columns_epoch_times(bundle_dir, tmp_path):
    values = fx.raw_values(100, seed=5)
    fx.write_csv(tmp_path / "a.csv", values)
    fx.write_csv(tmp_path / "b.csv", values, iso=False, order=["vibration", "flow", "pressure"],
                 extra=True)
    _, df_a, _ = stream(bundle_dir, tmp_path / "a.csv", tmp_path, "--backend", "numpy", tag="a")
    _, df_b, _ = stream(bundle_dir, tmp_path / "b.csv", tmp_path, "--backend", "numpy", tag="b")
    assert len(df_a) > 0 and df_a.equals(df_b)


def test_every_bad_input_kind_counted_and_stream_continues(bundle_dir, tmp_path):
    values = fx.raw_values(160, seed=3)
    lines = fx.write_csv(tmp_path / "clean.csv", values)
    _, clean_df, _ = stream(bundle_dir, tmp_path / "clean.csv", tmp_path, "--backend", "numpy",
                            tag="clean")

    def at(i):  # a time between good rows i and i+1 (the bad row is rejected before use)
        return format_time(fx.T0 + i + 0.5)

    bad = {
        20: [f"{at(20)},abc,Bad,-".encode()],               # non_numeric: every cell text
        30: [f"{at(30)},-inf,3.0,1.5".encode(), f"{at(30)},1.0,inf,1.5".encode()],  # non_finite
        40: [f"{at(40)},,NaN,null".encode()],                 # missing_value: every cell blank
        50: [f"{at(50)},1.0,3.0".encode(), f"{at(50)},1,2,3,4".encode()],    # column_count
        60: [(f"{at(60)}," + "1" * 70_000 + ",3.0,1.5").encode()],           # too_long
        70: [b"yesterday,1.0,3.0,1.5", b",1.0,3.0,1.5"],                     # bad_time
        80: [b"\xff\xfe\xfa,1.0,3.0,1.5"],                                   # bad_encoding
        90: [f"{at(90)},1e39,3.0,1.5".encode()],                             # out_of_range
        100: [lines[1 + 100].split(",")[0].encode() + b",9.0,9.0,9.0"],      # duplicate_time
        110: [format_time(fx.T0 + 95).encode() + b",9.0,9.0,9.0"],          # out_of_order
        120: [b"", b"   "],                                                  # blank lines
    }
    expected = {k: 0 for k in REJECT_KINDS}
    expected.update(non_numeric=1, non_finite=2, missing_value=1, column_count=2, too_long=1,
                    bad_time=2, bad_encoding=1, out_of_range=1, duplicate_time=1, out_of_order=1)
    raw = [lines[0].encode()]
    for i, line in enumerate(lines[1:]):
        raw.append(line.encode())
        raw.extend(bad.get(i, []))
    (tmp_path / "dirty.csv").write_bytes(b"\n".join(raw) + b"\n")

    events, df, _ = stream(bundle_dir, tmp_path / "dirty.csv", tmp_path, "--backend", "numpy",
                           tag="dirty")
    stop = events[-1]
    assert stop["errors"] == expected
    assert stop["counters"]["blank_lines"] == 2
    assert stop["counters"]["samples"] == 160
    # nothing silently dropped: every line is a sample, a blank or a counted rejection
    assert stop["counters"]["lines"] == 160 + 2 + sum(expected.values())
    # the rate-limited input_error events add up to the same counts
    reported = {}
    for e in of(events, "input_error"):
        for k, v in e["counts"].items():
            reported[k] = reported.get(k, 0) + v
    assert reported == {k: v for k, v in expected.items() if v}
    assert of(events, "input_error")[0]["example"]["kind"] == "non_numeric"
    # the stream went on: the scores are exactly those of the clean stream
    assert df.equals(clean_df)


def test_long_gap_resets_window_short_gap_interpolates(bundle_dir, tmp_path):
    n = 200
    values = fx.raw_values(n, seed=4)
    times = fx.T0 + np.arange(n, dtype=float)
    keep = np.ones(n, bool)
    keep[50:52] = False  # 2 missing periods <= max_gap_periods (3): interpolated
    keep[120:130] = False  # 10 missing periods: window reset
    fx.write_csv(tmp_path / "gaps.csv", values[keep], times=times[keep])
    events, df, _ = stream(bundle_dir, tmp_path / "gaps.csv", tmp_path, "--backend", "numpy")

    gaps = of(events, "gap")
    assert len(gaps) == 1 and gaps[0]["missing_periods"] == 10
    assert gaps[0]["start"] == format_time(times[119]) and gaps[0]["end"] == format_time(times[130])
    assert events[-1]["counters"]["interpolated"] == 2
    assert events[-1]["counters"]["gaps"] == 1

    x = fx.scaled(values)
    # reference: numpy.interp, linear in time between the samples either side of the gap
    for c in range(x.shape[1]):
        x[50:52, c] = np.interp(times[50:52], [times[49], times[52]], [x[49, c], x[52, c]])
    first = fx.direct_scores(bundle_dir, x[:120], WINDOW, HOP)
    second = fx.direct_scores(bundle_dir, x[130:], WINDOW, HOP)
    np.testing.assert_allclose(df.score.to_numpy(), np.concatenate([first, second]), rtol=1e-5)
    # after the reset the next score waits for a full window of new samples
    t_next = pd.to_datetime(df.time, utc=True)[len(first)]
    assert t_next == pd.Timestamp(times[130 + WINDOW - 1], unit="s", tz="UTC")


def test_numpy_and_onnxruntime_agree(bundle_dir, tmp_path):
    pytest.importorskip("onnxruntime")
    values = fx.raw_values(240, seed=8, anomalies=[(100, 20, 0, 5.0), (180, 12, 2, -6.0)])
    fx.write_csv(tmp_path / "a.csv", values)
    ev_np, df_np, _ = stream(bundle_dir, tmp_path / "a.csv", tmp_path, "--backend", "numpy",
                             tag="np")
    ev_ort, df_ort, _ = stream(bundle_dir, tmp_path / "a.csv", tmp_path, "--backend",
                               "onnxruntime", tag="ort")
    assert ev_np[0]["backend"] == "numpy" and ev_ort[0]["backend"] == "onnxruntime"
    assert len(df_np) == len(df_ort) > 0
    # reference: onnxruntime executing model.onnx (ONNX LSTM operator) vs our numpy LSTM
    np.testing.assert_allclose(df_ort.score.to_numpy(), df_np.score.to_numpy(), rtol=1e-5)
    # residuals per channel too, straight from the two scorers
    b = load_bundle(bundle_dir)
    w = fx.windows_of(fx.scaled(values), WINDOW, HOP)
    rule = ScoreRule(b.manifest["score"])
    s1, _, r1 = rule.score(w, make_scorer(b, "numpy").reconstruct(w))
    s2, _, r2 = rule.score(w, make_scorer(b, "onnxruntime").reconstruct(w))
    np.testing.assert_allclose(r2, r1, rtol=1e-5, atol=1e-7)
    np.testing.assert_allclose(s2, s1, rtol=1e-5)


def test_alert_event_names_the_channel_that_moved(bundle_dir, tmp_path):
    values = fx.raw_values(200, seed=9, anomalies=[(100, 24, 1, 8.0)])
    fx.write_csv(tmp_path / "a.csv", values)
    events, df, _ = stream(bundle_dir, tmp_path / "a.csv", tmp_path, "--backend", "numpy",
                           "--alert-db", str(tmp_path / "alerts.db"))
    opened, closed = of(events, "alert_opened"), of(events, "alert_closed")
    assert len(opened) == 1 and len(closed) == 1
    assert opened[0]["alert_id"] == closed[0]["alert_id"]
    assert closed[0]["channels"][0]["name"] == "pressure"
    assert closed[0]["channels"][0]["share"] > 0.5
    assert abs(sum(c["share"] for c in closed[0]["channels"]) - 1.0) < 1e-5  # all 3 channels
    assert closed[0]["peak_score"] == pytest.approx(df.score.max(), rel=1e-6)
    # the alert column marks the open span
    assert df.alert.sum() > 0
    # the counterfactual: pressure put back on its reconstruction lowers the score most; the closing event and the alert database carry the opening's answer
    moved = opened[0]["moved"]
    assert moved["name"] == "pressure" and moved["score_without"] < moved["score"]
    assert closed[0]["moved"] == moved
    import sqlite3
    with sqlite3.connect(str(tmp_path / "alerts.db")) as db:
        (stored,) = db.execute("SELECT moved FROM alerts").fetchone()
    assert json.loads(stored) == moved


def test_moved_is_the_written_out_counterfactual(bundle_dir, tmp_path):
    """Detector.moved against the rule written out here: for each channel, the score of the
    window with that channel's steps replaced by the network's reconstruction of the original
    window; the channel with the lowest such score."""
    from ganlet.runtime.detector import Detector

    b = load_bundle(bundle_dir)
    det = Detector(b, make_scorer(b, "numpy"))
    rule = ScoreRule(b.manifest["score"])
    window = fx.scaled(fx.raw_values(WINDOW, seed=2)).astype(np.float32)
    window[-3:, 1] += 6.0  # flow jumps in the newest steps
    net = make_scorer(b, "numpy")
    recon = net.reconstruct(window[None])
    score = float(rule.score(window[None], recon)[0][0])
    got = det.moved(window, recon, score)
    without = []
    for c in range(window.shape[1]):
        w = window.copy()
        w[:, c] = recon[0, :, c]
        without.append(float(rule.score(w[None], net.reconstruct(w[None]))[0][0]))
    assert got["name"] == b.channels[int(np.argmin(without))]
    assert got["score_without"] == pytest.approx(min(without), rel=1e-5)
    assert got["score"] == score


def test_an_alert_database_from_before_moved_gains_the_column(tmp_path):
    import sqlite3

    from ganlet.runtime.events import AlertDbSink

    path = tmp_path / "old.db"
    with sqlite3.connect(str(path)) as db:
        db.execute(AlertDbSink.SCHEMA.replace(" hops INTEGER NOT NULL,", " hops INTEGER NOT NULL")
                   .replace(" moved TEXT", ""))
        db.execute("INSERT INTO alerts VALUES ('a', 'b', 'closed', 't0', 't1', 2.0, 1.0, '[]', 3)")
    sink = AlertDbSink(path)
    sink.close()
    with sqlite3.connect(str(path)) as db:
        rows = db.execute("SELECT id, hops, moved FROM alerts").fetchall()
    assert rows == [("a", 3, None)]


def test_onnxruntime_asked_but_missing(bundle_dir, monkeypatch):
    b = load_bundle(bundle_dir)
    monkeypatch.setitem(__import__("sys").modules, "onnxruntime", None)  # import now fails
    with pytest.raises(BundleError, match="onnxruntime package cannot be imported"):
        make_scorer(b, "onnxruntime")
    assert make_scorer(b, "auto").name == "numpy"


def test_header_without_a_channel_is_refused(bundle_dir, tmp_path):
    (tmp_path / "h.csv").write_text("time,flow,vibration\n2024-01-01T00:00:00Z,1,2\n")
    err = io.StringIO()
    with contextlib.redirect_stdout(io.StringIO()) as out, contextlib.redirect_stderr(err):
        code = main(["stream", "--input", str(tmp_path / "h.csv")], bundle_dir=bundle_dir)
    assert code == 2 and "lacks channel(s) ['pressure']" in err.getvalue()
    assert json.loads(out.getvalue().splitlines()[-1])["reason"] == "bad_header"


def test_scores_file_says_where_it_comes_from(bundle_dir, tmp_path):
    import platform

    from ganlet.runtime.events import PROVENANCE_KEYS, read_provenance

    fx.write_csv(tmp_path / "c.csv", fx.raw_values(60))
    stream(bundle_dir, tmp_path / "c.csv", tmp_path, "--backend", "numpy")
    path = tmp_path / "run-scores.csv"
    lines = path.read_text().splitlines()
    head = [ln for ln in lines if ln.startswith("#")]
    assert lines[len(head)] == "time,score,threshold,alert" and lines[:len(head)] == head
    with open(path, "rb") as fh:
        said = read_provenance(fh)
    assert set(said) == set(PROVENANCE_KEYS)
    assert said["bundle_id"] == load_bundle(bundle_dir).bundle_id and said["backend"] == "numpy"
    # reference: the platform module and numpy of this interpreter, which ran the stream
    assert said["python"] == platform.python_version() and said["numpy"] == np.__version__
    assert said["machine"] == platform.machine()
    # reference: pandas.to_datetime reads the start time as an ISO 8601 UTC time
    started = pd.to_datetime(said["started"], utc=True)
    assert abs((pd.Timestamp.now(tz="UTC") - started).total_seconds()) < 600


def test_scores_of_another_bundle_are_not_appended_to(bundle_dir, tmp_path):
    other = fx.build_bundle(tmp_path / "other", window=WINDOW, hop=HOP, seed=5, onnx_model=False)
    fx.write_csv(tmp_path / "c.csv", fx.raw_values(60))
    stream(other, tmp_path / "c.csv", tmp_path, "--backend", "numpy")
    before = (tmp_path / "run-scores.csv").read_bytes()
    err = io.StringIO()
    with contextlib.redirect_stdout(io.StringIO()), contextlib.redirect_stderr(err):
        code = main(["stream", "--input", str(tmp_path / "c.csv"), "--scores-out",
                     str(tmp_path / "run-scores.csv"), "--heartbeat", "0"], bundle_dir=bundle_dir)
    assert code == 3
    assert f"holds scores of bundle {load_bundle(other).bundle_id[:12]}" in err.getvalue()
    assert (tmp_path / "run-scores.csv").read_bytes() == before
