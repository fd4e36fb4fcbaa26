"""Blank cells (runtime/blanks.py): one channel's reading missing while the others arrive.

The gateway must keep detecting on the channels it still has: a short blank is held from the
channel's last reading, a long one loses the channel (one `channel_lost` event) and the score
goes on without it until a whole window holds its readings again (`channel_back`)."""

import json
import math

import numpy as np
import pandas as pd
import pytest
import runtime_fixtures as fx
from test_stream import HOP, WINDOW, of, stream

from ganlet.runtime.blanks import BlankCells
from ganlet.runtime.detector import Detector
from ganlet.runtime.held import HeldReadings
from ganlet.runtime.intake import BLANK_CELLS, Dialect, format_time
from ganlet.runtime.lstm import Network
from ganlet.runtime.manifest import load_bundle
from ganlet.runtime.score import ScoreRule, score_section
from ganlet.runtime.scorer import make_scorer
from ganlet.runtime.weights import load_weights

MAX_GAP = 3  # the fixture bundle's max_gap_periods
VIB = 2  # vibration, the channel that goes blank


@pytest.fixture(scope="module")
def bundle_dir(tmp_path_factory):
    return fx.build_bundle(tmp_path_factory.mktemp("b") / "bundle", window=WINDOW, hop=HOP,
                           max_gap_periods=MAX_GAP)


def write_with_blanks(path, values, blank_rows, cell=""):
    """The fixture CSV with vibration written as `cell` on blank_rows."""
    fx.write_csv(path, values)
    fx.blank_out(path, blank_rows, VIB, cell)


def written_out_scores(bundle_dir, x, left_out_from=None, rejoin_at=None):
    """Scores computed here for every hop of x [T, C] (scaled, NaN where the channel is lost),
    the rule written out: the network sees a lost cell at 0 (the scaler's centre: the fixture's
    score has no regimes); a hop whose newest row is at or after left_out_from and before
    rejoin_at counts its residual as 0 in the mean over all channels ("mean" combine)."""
    net = Network(load_weights(bundle_dir / "weights.npz"))
    rule = ScoreRule(score_section())
    scores = []
    for end in range(WINDOW, len(x) + 1, HOP):
        w = x[end - WINDOW:end].copy()
        newest = end - 1
        left_out = (left_out_from is not None and newest >= left_out_from
                    and (rejoin_at is None or newest < rejoin_at))
        w = np.nan_to_num(w, nan=0.0)
        res = rule.residuals(w[None], net.reconstruct(w[None]))[0]
        if left_out:
            res[VIB] = 0.0
        scores.append(float(np.mean(res)))
    return np.asarray(scores)


def test_a_short_blank_is_held_then_drawn_as_a_line_once_it_ends(bundle_dir, tmp_path):
    values = fx.raw_values(120, seed=21)
    start, end = 61, 61 + MAX_GAP  # end: the reading that ends the blank (a hop at 63)
    write_with_blanks(tmp_path / "a.csv", values, range(start, end))
    events, df, _ = stream(bundle_dir, tmp_path / "a.csv", tmp_path, "--backend", "numpy")
    assert of(events, "channel_lost") == [] and of(events, "channel_back") == []
    assert events[-1]["counters"]["blank_cells"] == MAX_GAP
    assert events[-1]["counters"]["samples"] == 120
    held = fx.scaled(values)
    held[start:end, VIB] = held[start - 1, VIB]  # the hops while the blank lasts
    line = values.copy()  # the hops after it; reference: numpy.interp, as pandas fills a gap
    line[start:end, VIB] = np.interp(np.arange(start, end), [start - 1, end],
                                     values[[start - 1, end], VIB])
    newest = np.arange(WINDOW - 1, 120, HOP)
    expected = np.where(newest >= end, written_out_scores(bundle_dir, fx.scaled(line)),
                        written_out_scores(bundle_dir, held))
    np.testing.assert_allclose(df.score.to_numpy(), expected, rtol=1e-5)
    assert (newest >= end).sum() > 10 and ((newest >= start) & (newest < end)).sum() >= 1


def test_a_dead_channel_is_named_once_and_the_others_are_still_watched(bundle_dir, tmp_path):
    # vibration dead from row 100 to the end; a flow fault at rows 200-223 while it is dead
    values = fx.raw_values(300, seed=22, anomalies=[(200, 24, 0, 8.0)])
    write_with_blanks(tmp_path / "dead.csv", values, range(100, 300))
    fx.write_csv(tmp_path / "whole.csv", values)
    events, df, _ = stream(bundle_dir, tmp_path / "dead.csv", tmp_path, "--backend", "numpy")
    whole_events, whole, _ = stream(bundle_dir, tmp_path / "whole.csv", tmp_path, "--backend",
                                    "numpy", tag="whole")
    # every hop is still scored: before, each row with the blank cell was refused whole
    assert len(df) == len(whole) and events[-1]["errors"]["missing_value"] == 0
    lost = of(events, "channel_lost")
    assert len(lost) == 1 and of(events, "channel_back") == []
    # the stop event (as each heartbeat) names the channels lost at the moment
    assert events[-1]["channels_lost"] == ["vibration"] and whole_events[-1]["channels_lost"] == []
    assert lost[0]["channel"] == "vibration" and lost[0]["blank_rows"] == MAX_GAP + 1
    assert lost[0]["time"] == format_time(fx.T0 + 100 + MAX_GAP)
    assert lost[0]["since"] == format_time(fx.T0 + 100)
    x = fx.scaled(values)
    x[100:100 + MAX_GAP, VIB] = x[99, VIB]  # held for MAX_GAP rows, then lost
    x[100 + MAX_GAP:, VIB] = np.nan
    expected = written_out_scores(bundle_dir, x, left_out_from=100 + MAX_GAP)
    np.testing.assert_allclose(df.score.to_numpy(), expected, rtol=1e-5)
    opened, closed = of(events, "alert_opened"), of(events, "alert_closed")
    assert len(opened) == 1 and opened[0]["moved"]["name"] == "flow"
    assert format_time(fx.T0 + 200) <= opened[0]["opened"] <= format_time(fx.T0 + 224)
    shares = {c["name"]: c["share"] for c in closed[0]["channels"]}
    assert shares["flow"] > 0.5 and shares["vibration"] == 0.0


def test_a_channel_that_comes_back_rejoins_once_a_window_holds_its_readings(bundle_dir,
                                                                             tmp_path):
    values = fx.raw_values(260, seed=23)
    write_with_blanks(tmp_path / "a.csv", values, range(80, 140), cell="NaN")
    events, df, _ = stream(bundle_dir, tmp_path / "a.csv", tmp_path, "--backend", "numpy")
    # back once it has read for a whole window: rows 140 .. 140 + WINDOW - 1
    (back,) = of(events, "channel_back")
    rejoin = 140 + WINDOW - 1
    assert back["channel"] == "vibration" and back["time"] == format_time(fx.T0 + rejoin)
    assert back["since"] == format_time(fx.T0 + 80)
    assert back["reading_since"] == format_time(fx.T0 + 140) and back["readings"] == WINDOW
    x = fx.scaled(values)
    x[80:80 + MAX_GAP, VIB] = x[79, VIB]
    x[80 + MAX_GAP:140, VIB] = np.nan
    expected = written_out_scores(bundle_dir, x, left_out_from=80 + MAX_GAP, rejoin_at=rejoin)
    np.testing.assert_allclose(df.score.to_numpy(), expected, rtol=1e-5)
    # `ganlet demo` says it in words, from the same events
    from ganlet.compile.demo import feed_notes

    assert feed_notes(events) == [
        f"vibration lost at {format_time(fx.T0 + 83)} (blank since {format_time(fx.T0 + 80)}): "
        "scored on the other channels",
        f"vibration back in the score at {format_time(fx.T0 + rejoin)} (reading again since "
        f"{format_time(fx.T0 + 140)})"]
    # once rejoined, the hops are the ones of the file without blanks
    fx.write_csv(tmp_path / "whole.csv", values)
    _, whole, _ = stream(bundle_dir, tmp_path / "whole.csv", tmp_path, "--backend", "numpy",
                         tag="whole")
    after = pd.to_datetime(df.time, utc=True) >= pd.Timestamp(fx.T0 + rejoin, unit="s", tz="UTC")
    assert after.sum() > 10
    np.testing.assert_allclose(df.score[after], whole.score[after], rtol=1e-6)


def test_a_channel_read_only_now_and_then_is_lost_once_not_flapping(bundle_dir, tmp_path):
    """A channel logged every 10th row (slower than the others), from row 50 on."""
    values = fx.raw_values(300, seed=25)
    write_with_blanks(tmp_path / "slow.csv", values, [k for k in range(50, 300) if k % 10])
    events, df, _ = stream(bundle_dir, tmp_path / "slow.csv", tmp_path, "--backend", "numpy")
    assert [e["event"] for e in events if e["event"].startswith("channel")] == ["channel_lost"]
    assert events[-1]["counters"]["hops"] == (300 - WINDOW) // HOP + 1  # every hop scored
    assert events[-1]["counters"]["blank_cells"] == 225


def test_a_restart_while_a_channel_is_lost_changes_nothing(bundle_dir):
    """Detector.state() through JSON, as the checkpoint keeps it, in the middle of a loss."""
    b = load_bundle(bundle_dir)
    values = fx.raw_values(200, seed=24, anomalies=[(150, 20, 1, 8.0)])
    values[60:130, VIB] = np.nan

    def run(rows, det):
        return [e for k in rows for e in det.feed(fx.T0 + k, values[k])]

    whole = run(range(200), Detector(b, make_scorer(b, "numpy")))
    first = Detector(b, make_scorer(b, "numpy"))
    events = run(range(100), first)
    second = Detector(b, make_scorer(b, "numpy"))
    second.restore(json.loads(json.dumps(first.state(), allow_nan=False)))
    events += run(range(100, 200), second)
    assert events == whole
    assert [e["event"] for e in whole if e["event"].startswith("channel")] == [
        "channel_lost", "channel_back"]


def test_a_row_with_every_channel_blank_is_refused(bundle_dir, tmp_path):
    b = load_bundle(bundle_dir)
    det = Detector(b, make_scorer(b, "numpy"))
    from ganlet.runtime.intake import RowError

    with pytest.raises(RowError) as err:
        det.feed(fx.T0, [math.nan] * 3)
    assert err.value.kind == "missing_value" and det.counters["samples"] == 0


def test_blank_cells_are_the_cells_pandas_reads_as_missing():
    """Reference: pandas.read_csv's default missing-value strings (pandas IO docs, `na_values`:
    "By default the following values are interpreted as NaN"), which the workstation trains
    with: the gateway reads a file's gaps as training read them."""
    from pandas._libs.parsers import STR_NA_VALUES

    assert BLANK_CELLS == frozenset(STR_NA_VALUES)
    d = Dialect()
    assert all(math.isnan(d.number("flow", cell)) for cell in STR_NA_VALUES)
    assert d.number("flow", "1.5") == 1.5


def test_a_quality_flag_in_one_channel_is_read_as_a_blank_and_counted(bundle_dir, tmp_path):
    # a historian writes "Bad" (or "Comm Fail") where a transmitter failed: one short spell and
    # one long one (the channel is lost). Reference: the same file with those cells empty,
    # which is what pandas reads with na_values=["Bad", "Comm Fail"]; the gateway scores both
    # alike and refuses no row
    values = fx.raw_values(200, seed=23)
    short, long = range(50, 52), range(100, 160)
    write_with_blanks(tmp_path / "empty.csv", values, [*short, *long])
    fx.write_csv(tmp_path / "flags.csv", values)
    fx.blank_out(tmp_path / "flags.csv", short, VIB, "Bad")
    fx.blank_out(tmp_path / "flags.csv", long, VIB, "Comm Fail")
    read = pd.read_csv(tmp_path / "flags.csv", na_values=["Bad", "Comm Fail"])
    assert read.equals(pd.read_csv(tmp_path / "empty.csv"))
    ev_empty, df_empty, _ = stream(bundle_dir, tmp_path / "empty.csv", tmp_path, "--backend",
                                   "numpy", tag="empty")
    ev_flags, df_flags, _ = stream(bundle_dir, tmp_path / "flags.csv", tmp_path, "--backend",
                                   "numpy", tag="flags")
    assert df_flags.equals(df_empty)
    stop = ev_flags[-1]
    assert stop["counters"]["samples"] == 200 and not any(stop["errors"].values())
    assert stop["counters"]["text_cells"] == stop["counters"]["blank_cells"] == 62
    assert ev_empty[-1]["counters"]["text_cells"] == 0
    lost = of(ev_flags, "channel_lost")
    assert [e["channel"] for e in lost] == [fx.CHANNELS[VIB][0]]


def test_a_cell_with_a_decimal_comma_still_refuses_its_row():
    # a feed whose decimal mark is not the bundle's: refusing says so (reading it as blank
    # would drop the reading without a word); read with the right --decimal it is a number
    from ganlet.runtime.intake import Header, RowError
    header = Header("time;flow;pressure", "time", ["flow", "pressure"], Dialect(sep=";"))
    for cell in ("1,5", "-0,25", "1.234,5"):
        with pytest.raises(RowError, match="decimal comma") as info:
            header.parse(f"2026-03-02T10:00:00Z;{cell};2")
        assert info.value.kind == "non_numeric"
    t, values, text = header.parse("2026-03-02T10:00:00Z;Bad;2")
    assert math.isnan(values[0]) and values[1] == 2.0 and text == 1
    continental = Header("time;flow;pressure", "time", ["flow", "pressure"],
                         Dialect(sep=";", decimal=","))
    t, values, text = continental.parse("2026-03-02T10:00:00Z;Bad;2,5")
    assert math.isnan(values[0]) and values[1] == 2.5 and text == 1


def test_a_cell_grouped_in_thousands_refuses_its_row_with_a_hint():
    # 1,234.5 (quoted in a comma file, as a spreadsheet writes it) and 1.234,5 beside a decimal
    # comma: numbers written another way, refused with what to send instead; a 1,234 with no
    # decimal part may be a decimal comma and keeps that hint
    from ganlet.runtime.intake import GROUPS_HINT, Header, RowError
    header = Header("time,flow,pressure", "time", ["flow", "pressure"], Dialect(sep=","))
    for cell in ('"1,234.5"', '"-12,345,678"'):
        with pytest.raises(RowError) as info:
            header.parse(f"2026-03-02T10:00:00Z,{cell},2")
        assert info.value.kind == "non_numeric" and GROUPS_HINT in str(info.value)
    with pytest.raises(RowError, match="decimal comma"):
        header.parse('2026-03-02T10:00:00Z,"1,234",2')
    continental = Header("time;flow;pressure", "time", ["flow", "pressure"],
                         Dialect(sep=";", decimal=","))
    with pytest.raises(RowError) as info:
        continental.parse("2026-03-02T10:00:00Z;1.234,5;2")
    assert GROUPS_HINT in str(info.value) and "--decimal" not in str(info.value)
    t, values, text = header.parse("2026-03-02T10:00:00Z,1234.5,2")
    assert values == [1234.5, 2.0] and text == 0


def test_a_blank_neither_holds_nor_moves_a_reading():
    held = HeldReadings([3])
    for v in (1.0, 1.0, math.nan, 1.0, 1.0):
        held.add([v])
    assert held.runs == [2]  # the blank ended the run of 1.0 (as held.run_lengths counts it)


def test_a_blank_before_any_reading_loses_the_channel_at_once():
    blanks = BlankCells(["a", "b"], max_gap_periods=3, rejoin_rows=4)
    filled, events, after = blanks.plan([(0.0, np.array([np.nan, 1.0]))], None, str)
    assert [e["event"] for e in events] == ["channel_lost"] and np.isnan(filled[0][1][0])
    assert blanks.left_out.tolist() == [False, False]  # plan changes nothing
    blanks.commit(after)
    filled, events, after = blanks.plan([(1.0, np.array([2.0, 1.0]))], filled[0][1], str)
    blanks.commit(after)
    assert events == [] and filled[0][2].tolist() == [True, False] and blanks.read == [1, 0]


def test_a_blank_right_after_a_long_gap_is_held_not_lost(bundle_dir, tmp_path):
    values = fx.raw_values(200, seed=27)
    keep = np.r_[0:100, 110:150, 160:200]  # rows 100-109 and 150-159 missing: window resets
    fx.write_csv(tmp_path / "a.csv", values[keep], times=fx.T0 + keep.astype(float))
    # the last row before the first gap and the first two after it (data rows 99, 100, 101);
    # the last row before the second gap, whose blank the first row after it ends (row 139)
    fx.blank_out(tmp_path / "a.csv", [99, 100, 101, 139], VIB)
    events, _, _ = stream(bundle_dir, tmp_path / "a.csv", tmp_path, "--backend", "numpy")
    assert len(of(events, "gap")) == 2 and events[-1]["counters"]["blank_cells"] == 4
    assert of(events, "channel_lost") == [] and events[-1]["channels_lost"] == []


def test_a_short_gap_of_rows_and_one_blank_cell_do_not_add_up_to_a_lost_channel():
    """Rows 1 and 2 missing, row 3 read without channel a: the filled-in rows hold a's last
    reading and only row 3's cell counts as blank (one row, within max_gap_periods)."""
    blanks = BlankCells(["a", "b"], max_gap_periods=1, rejoin_rows=4)
    grid = [(1.0, np.array([np.nan, 1.5])), (2.0, np.array([np.nan, 2.0])),
            (3.0, np.array([np.nan, 2.5]))]
    filled, events, after = blanks.plan(grid, np.array([5.0, 1.0]), str)
    assert events == [] and [r[1][0] for r in filled] == [5.0, 5.0, 5.0]
    assert after["run"] == [1, 0]


def test_the_fill_is_the_centre_of_the_regime_each_row_s_known_channels_are_in():
    rule = ScoreRule(score_section(centres=[[0.0, 0.0, 0.0], [2.0, 2.0, -1.0]],
                                   scale=[[1.0, 1.0, 1.0], [2.0, 2.0, 2.0]], combine="rms"))
    window = np.array([[0.1, -0.1, np.nan],   # the known channels at regime 0
                       [1.9, 2.1, np.nan],    # at regime 1: the pump started
                       [1.8, 2.2, 5.0]], dtype=np.float32)
    filled = rule.fill(window)
    assert filled[:, 2].tolist() == [0.0, -1.0, 5.0] and filled[:, :2].tolist() == \
        window[:, :2].tolist()
    assert np.isnan(window[0, 2])  # the ring's window is not changed
    # without regimes: the scaler's centre
    assert ScoreRule(score_section()).fill(window)[:, 2].tolist() == [0.0, 0.0, 5.0]


def test_a_channel_left_out_counts_as_reconstructed_exactly():
    rule = ScoreRule(score_section(centres=[[0.0, 0.0, 0.0], [2.0, 2.0, -1.0]],
                                   scale=[[1.0, 1.0, 1.0], [2.0, 2.0, 2.0]], combine="rms"))
    live = np.array([True, True, False])
    # the live channels sit at regime 1; the left-out one's mean (9) must not decide it
    scores, parts = rule.apply(np.array([[4.0, 16.0, 100.0]]), np.array([[1.9, 2.1, 9.0]]),
                               live)
    # regime 1 scales 2: parts sqrt(4)/2 = 1 and sqrt(16)/2 = 2, the left-out one 0; the rms
    # over all three sqrt(5 / 3): a one-channel excursion scores as with the channel there
    assert parts.tolist() == [[1.0, 2.0, 0.0]]
    assert scores[0] == pytest.approx(math.sqrt(5 / 3), rel=1e-6)
