"""Data intake at the boundary: delimiters, formats, columns, the grid, gaps, repairs, errors,
and the spans and robust scaler that training relies on."""

from __future__ import annotations

import re
import warnings

import numpy as np
import pandas as pd
import pytest
from synthetic import correlated_series

from ganlet.compile.data import (
    IntakeError,
    IntakeOptions,
    RobustScaler,
    choose_window,
    grid_index,
    load_frame,
    spans_summary,
    split_spans,
    windows_from,
)
from ganlet.compile.model import TeacherConfig
from ganlet.compile.train import train

CHANNELS = ["flow", "power", "temp"]


def _seconds(times) -> np.ndarray:
    return (pd.DatetimeIndex(times) - pd.Timestamp("2026-01-05")).total_seconds().to_numpy()


# ------------------------------------------------------------------------------------------
# reading


@pytest.mark.parametrize("sep", [",", ";", "\t"])
def test_delimiter_is_sniffed(write_csv, sep):
    df = correlated_series(200)
    frame = load_frame(write_csv(df, sep=sep))
    assert frame.channels == CHANNELS
    assert frame.period_s == 60.0
    # reference: pandas.read_csv with the delimiter given explicitly
    expected = pd.read_csv(write_csv(df, "ref.csv", sep=sep), sep=sep)[CHANNELS].to_numpy()
    np.testing.assert_allclose(frame.values, expected)


def test_sep_option_is_used_and_a_wrong_sep_says_check_sep(write_csv):
    path = write_csv(correlated_series(100), sep=";")
    frame = load_frame(path, IntakeOptions(sep=";"))
    assert frame.channels == CHANNELS
    with pytest.raises(IntakeError, match=r"read one column 'time;flow;power;temp' with "
                                          r"delimiter ','; the delimiter looks wrong, give it with --sep"):
        load_frame(path, IntakeOptions(sep=","))


def test_parquet_reads_like_csv(tmp_path, write_csv):
    pytest.importorskip("pyarrow")
    df = correlated_series(150)
    df.to_parquet(tmp_path / "data.parquet", index=False)
    from_parquet = load_frame(tmp_path / "data.parquet")
    from_csv = load_frame(write_csv(df))
    assert from_parquet.channels == CHANNELS
    assert (from_parquet.times == from_csv.times).all()
    np.testing.assert_allclose(from_parquet.values, from_csv.values)   # reference: pandas


def test_missing_file_and_empty_file(tmp_path):
    with pytest.raises(IntakeError, match="no such file"):
        load_frame(tmp_path / "nope.csv")
    (tmp_path / "empty.csv").write_text("")
    with pytest.raises(IntakeError, match="empty"):
        load_frame(tmp_path / "empty.csv")


# ------------------------------------------------------------------------------------------
# columns


def test_time_column_auto_detected_by_name_and_by_content(write_csv):
    df = correlated_series(100)
    by_name = df.rename(columns={"time": "Timestamp"})[["flow", "Timestamp", "power", "temp"]]
    frame = load_frame(write_csv(by_name, "a.csv"))
    assert frame.report.time_col == "Timestamp" and frame.channels == CHANNELS
    by_content = df.rename(columns={"time": "when"})
    frame = load_frame(write_csv(by_content, "b.csv"))
    assert frame.report.time_col == "when"
    assert frame.times[0] == pd.Timestamp("2026-01-05")


def test_time_col_option_picks_among_two_and_unknown_lists_columns(write_csv):
    df = correlated_series(100)
    df.insert(1, "logged", df["time"] + pd.Timedelta("1h"))
    frame = load_frame(write_csv(df), IntakeOptions(time_col="logged"))
    assert frame.times[0] == pd.Timestamp("2026-01-05 01:00")
    with pytest.raises(IntakeError, match=r"time column 'stamp' not found; columns are time, logged"):
        load_frame(write_csv(df), IntakeOptions(time_col="stamp"))


def test_epoch_seconds_time_column_and_grid_index(write_csv):
    df = correlated_series(100)
    epoch = (df["time"] - pd.Timestamp("1970-01-01")) // pd.Timedelta("1s")
    df["time"] = epoch
    frame = load_frame(write_csv(df))
    assert frame.times[0] == pd.Timestamp("2026-01-05") and frame.period_s == 60.0
    np.testing.assert_array_equal(grid_index(frame, epoch.iloc[[0, 7, 99]]), [0, 7, 99])


def test_channels_are_the_numeric_columns_or_the_named_ones(write_csv):
    df = correlated_series(100)
    df["site"] = "north"
    df["running"] = True
    frame = load_frame(write_csv(df))
    assert frame.channels == CHANNELS
    frame = load_frame(write_csv(df), IntakeOptions(channels=["temp", "flow"]))
    assert frame.channels == ["temp", "flow"]
    np.testing.assert_allclose(frame.values, df[["temp", "flow"]].to_numpy())
    with pytest.raises(IntakeError, match=r"--channels names unknown column\(s\): speed"):
        load_frame(write_csv(df), IntakeOptions(channels=["speed"]))
    with pytest.raises(IntakeError, match=r"channel\(s\) site are not numeric"):
        load_frame(write_csv(df), IntakeOptions(channels=["flow", "site"]))


def test_label_like_columns_are_excluded_automatically_and_by_option(write_csv):
    df = correlated_series(100)
    df["anomaly"] = 0.0
    df["changepoint"] = 0.0
    frame = load_frame(write_csv(df))
    assert frame.channels == CHANNELS
    assert frame.report.excluded == ["anomaly", "changepoint"]
    frame = load_frame(write_csv(df), IntakeOptions(exclude=["power"]))
    assert frame.channels == ["flow", "temp"]
    assert frame.report.excluded == ["anomaly", "changepoint", "power"]
    assert "excluded  anomaly, changepoint, power" in frame.report.summary()
    with pytest.raises(IntakeError, match=r"--exclude names unknown column\(s\): pressure"):
        load_frame(write_csv(df), IntakeOptions(exclude=["pressure"]))


def test_no_numeric_channel(write_csv):
    df = pd.DataFrame({"time": pd.date_range("2026-01-05", periods=20, freq="1min"),
                       "state": ["on"] * 20, "anomaly": [0] * 20})
    with pytest.raises(IntakeError, match=r"no numeric channel found besides the time column 'time'"):
        load_frame(write_csv(df))



def test_a_column_blank_in_every_row_is_left_out_or_refused_when_named(write_csv):
    # A spare input or a tag never wired: every cell empty. Before, the gap filling read every
    # row as a gap and the error named the first channel, not the blank one.
    df = correlated_series(100)
    df["spare"] = np.nan
    with pytest.warns(UserWarning, match="column 'spare' holds no number in any row: left out"):
        frame = load_frame(write_csv(df))
    assert frame.channels == CHANNELS
    assert frame.report.excluded == ["spare"]
    np.testing.assert_allclose(frame.values, df[CHANNELS].to_numpy())
    with pytest.raises(IntakeError, match=r"channel\(s\) 'spare' hold no number in any row"):
        load_frame(write_csv(df), IntakeOptions(channels=["flow", "spare"]))



def test_a_units_row_under_the_header_gives_the_units(tmp_path):
    # Many SCADA exports write a units row under the header. Before, it made every channel
    # text and training said "no numeric channel found".
    df = correlated_series(100)
    path = tmp_path / "units.csv"
    with open(path, "w") as fh:
        fh.write("time,flow,power,temp\n,l/min,kW,\n")
        df.to_csv(fh, index=False, header=False)
    with pytest.warns(UserWarning, match="units row, read as units: flow l/min, power kW"):
        frame = load_frame(path, IntakeOptions(units={"power": "W"}))
    assert frame.channels == CHANNELS and frame.units == ["l/min", "W", ""]  # --units wins
    np.testing.assert_allclose(frame.values, df[CHANNELS].to_numpy())
    # with decimal commas the numbers under it are read as the gateway reads them
    commas = tmp_path / "commas.csv"
    with open(commas, "w") as fh:
        fh.write("time;flow;power;temp\n;l/min;kW;degC\n")
        df.to_csv(fh, index=False, header=False, sep=";", decimal=",")
    with pytest.warns(UserWarning, match="units row"):
        frame = load_frame(commas, IntakeOptions(decimal=","))
    assert frame.units == ["l/min", "kW", "degC"]
    np.testing.assert_allclose(frame.values, df[CHANNELS].to_numpy())
    # a file whose first row is data is read as before
    assert load_frame(write_plain(tmp_path / "plain.csv", df)).report.rows_read == 100


def write_plain(path, df):
    df.to_csv(path, index=False)
    return path



def test_lines_above_the_header_are_named_with_how_many_to_remove(tmp_path):
    # An export's title and date range above the header: before, "cannot parse as CSV ...;
    # try --sep", which is not the problem.
    path = tmp_path / "export.csv"
    with open(path, "w") as fh:
        fh.write("Export: station P2\nFrom 2026-01-05 to 2026-01-06\n\n")
        correlated_series(100).to_csv(fh, index=False)
    with pytest.raises(IntakeError, match=r"3 line\(s\) above the header \('Export: station "
                                          r"P2'\); remove them"):
        load_frame(path)


def test_a_time_split_over_a_date_and_a_time_of_day_column_says_to_join_them(tmp_path):
    df = correlated_series(100)
    t = pd.to_datetime(df.pop("time"))
    df.insert(0, "Time", t.dt.strftime("%H:%M:%S"))
    df.insert(0, "Date", t.dt.strftime("%d.%m.%Y"))
    with pytest.raises(IntakeError, match=r"split over column 'Date' \(dates\) and 'Time' "
                                          r"\(times of day\); join them .*'05.01.2026 00:00:00'"):
        load_frame(write_plain(tmp_path / "split.csv", df))


# ------------------------------------------------------------------------------------------
# the grid


def test_period_is_the_median_spacing_or_period_s(write_csv):
    df = correlated_series(200)
    jitter = np.random.default_rng(0).uniform(-5, 5, len(df))
    df["time"] = df["time"] + pd.to_timedelta(jitter, unit="s")
    frame = load_frame(write_csv(df))
    # reference: numpy.median of the spacings (59.77 s here), snapped to the whole 60 s
    median = float(np.median(np.diff(df["time"].to_numpy()).astype("timedelta64[ns]").astype(float))) / 1e9
    assert median != 60.0 and abs(median - 60.0) < 0.6
    assert frame.period_s == 60.0
    assert f"median spacing {median:.6g} s taken as 1 min" in frame.report.warnings
    # unsnapped, the 0.23 s error adds up to most of a period over 200 rows and rows collide
    assert frame.report.grid_points == 200 and frame.report.missing_points == 0
    odd = correlated_series(100)
    odd["time"] = pd.date_range("2026-01-05", periods=100, freq="37500ms")
    assert load_frame(write_csv(odd, "odd.csv")).period_s == 37.5      # not near a whole second
    frame = load_frame(write_csv(correlated_series(200)), IntakeOptions(period_s=120))
    # 200 rows at 60 s: the last row (199 min) rounds half up onto slot 100
    assert frame.period_s == 120 and frame.report.grid_points == 101


def test_resampling_onto_a_coarser_grid_averages_each_slot(write_csv):
    df = correlated_series(240)                       # 60 s data
    frame = load_frame(write_csv(df), IntakeOptions(period_s=180))
    # reference: pandas resample with bins [t - P/2, t + P/2) centred on the grid points
    ref = (df.set_index("time")[CHANNELS]
           .resample("180s", origin=pd.Timestamp("2026-01-05") - pd.Timedelta("90s")).mean())
    ref.index = ref.index + pd.Timedelta("90s")
    assert (frame.times == ref.index).all()
    np.testing.assert_allclose(frame.values, ref.to_numpy())
    assert frame.report.duplicates == 0               # resampling is not a duplicate timestamp
    assert any("averaged onto the 3 min grid" in w for w in frame.report.warnings)


def test_resampling_onto_a_finer_grid_interpolates(write_csv):
    df = correlated_series(100, period_s=120)
    frame = load_frame(write_csv(df), IntakeOptions(period_s=60))
    assert frame.report.grid_points == 199 and frame.report.filled_points == 99
    x = _seconds(df["time"])
    for j, name in enumerate(CHANNELS):   # reference: numpy.interp
        np.testing.assert_allclose(frame.values[:, j], np.interp(_seconds(frame.times), x, df[name]))


def _with_gaps(n=300, short=(100, 103), long=(200, 220)):
    df = correlated_series(n)
    drop = list(range(*short)) + list(range(*long))
    return df, df.drop(index=drop).reset_index(drop=True)


def test_short_gaps_interpolated_long_gaps_split(write_csv):
    full, gappy = _with_gaps()
    frame = load_frame(write_csv(gappy))
    r = frame.report
    assert r.grid_points == 300 and r.missing_points == 23 and r.filled_points == 3
    assert r.segments == 2 and len(r.long_gaps) == 1 and r.long_gaps[0][2] == 20
    assert frame.segments() == [(0, 200), (220, 300)]
    assert np.isnan(frame.values[200:220]).all()
    x = _seconds(gappy["time"])
    grid_s = _seconds(frame.times)
    for j, name in enumerate(CHANNELS):   # reference: numpy.interp over the observed rows
        np.testing.assert_allclose(frame.values[100:103, j], np.interp(grid_s[100:103], x, gappy[name]))
    np.testing.assert_allclose(frame.values[:100], full[CHANNELS].to_numpy()[:100])

    length = 16
    windows, ends = windows_from(frame.values, frame.segments(), length)
    assert not np.isnan(windows).any()
    starts = ends - length + 1
    assert not ((starts < 220) & (ends >= 200)).any()            # no window touches the gap
    assert len(ends) == (200 - length + 1) + (80 - length + 1)    # every other window is there
    np.testing.assert_allclose(windows[-1], frame.values[300 - length:300])


def test_max_fill_periods_decides_what_is_short(write_csv):
    _, gappy = _with_gaps()
    frame = load_frame(write_csv(gappy), IntakeOptions(max_fill_periods=2))
    assert frame.report.segments == 3 and frame.report.filled_points == 0
    frame = load_frame(write_csv(gappy), IntakeOptions(max_fill_periods=20))
    assert frame.report.segments == 1 and frame.report.filled_points == 23


def test_a_missing_cell_is_interpolated_in_its_channel_only(write_csv):
    df = correlated_series(50)
    df.loc[10, "power"] = np.nan
    frame = load_frame(write_csv(df))
    assert frame.report.filled_points == 1 and frame.report.segments == 1
    assert frame.values[10, 1] == pytest.approx((df["power"][9] + df["power"][11]) / 2)
    assert frame.values[10, 0] == df["flow"][10] and frame.values[10, 2] == df["temp"][10]


def test_out_of_order_rows_are_sorted_with_a_warning(write_csv):
    df = correlated_series(100)
    shuffled = df.iloc[[*range(0, 40), 45, 41, 42, 43, 44, 40, *range(46, 100)]]
    with pytest.warns(UserWarning, match="out of time order; sorted"):
        frame = load_frame(write_csv(shuffled))
    assert frame.report.out_of_order > 0
    np.testing.assert_allclose(frame.values, df[CHANNELS].to_numpy())


def test_duplicate_timestamps_are_averaged_and_counted(write_csv):
    df = correlated_series(100)
    repeats = df.iloc[[10, 20, 30, 40, 50]].copy()
    repeats[CHANNELS] += 1.0
    with pytest.warns(UserWarning, match="out of time order"):   # the repeats come last
        frame = load_frame(write_csv(pd.concat([df, repeats])))
    assert frame.report.duplicates == 5
    assert "5 duplicate timestamps resolved by averaging" in frame.report.warnings
    assert "5 duplicate timestamps (averaged)" in frame.report.summary()
    # reference: pandas groupby(time).mean()
    ref = pd.concat([df, repeats]).groupby("time")[CHANNELS].mean().to_numpy()
    np.testing.assert_allclose(frame.values, ref)


def test_unparsable_times(write_csv):
    df = correlated_series(100)
    df["time"] = df["time"].astype(str)
    df.loc[[5, 6, 7], "time"] = "soon"
    with pytest.raises(IntakeError, match=r"column 'time': 3 of 100 times cannot be parsed "
                                          r"\(first at data row 6: 'soon'\)"):
        load_frame(write_csv(df))
    big = correlated_series(400)
    big["time"] = big["time"].astype(str)
    big.loc[200, "time"] = "??"                        # one in 400: dropped, and reported
    frame = load_frame(write_csv(big, "big.csv"))
    assert frame.report.unparsable_times == 1 and frame.report.filled_points == 1


# ------------------------------------------------------------------------------------------
# spans, scaler, window


def test_constant_channel_is_named(write_csv):
    df = correlated_series(300)
    df.loc[:199, "power"] = 4.0                        # constant over the fit span only
    frame = load_frame(write_csv(df))
    spans = split_spans(frame, 250, 0.2)
    fit = frame.values[spans.fit[0]:spans.fit[1]]
    with pytest.raises(IntakeError, match=r"channel 'power' is constant over the training span "
                                          r"\(value 4\)"):
        RobustScaler.fit(fit, frame.channels)
    RobustScaler.fit(frame.values, frame.channels)    # over all rows it does vary


def test_robust_scaler_matches_pandas_median_and_iqr():
    rng = np.random.default_rng(0)
    values = rng.standard_t(3, size=(501, 3)) * [1.0, 10.0, 0.1] + [0.0, 50.0, -3.0]
    values[17, 1] = np.nan
    scaler = RobustScaler.fit(values, ["a", "b", "c"])
    for j in range(3):
        s = pd.Series(values[:, j])
        # reference: pandas.Series.median / Series.quantile (linear, NaN skipped)
        assert scaler.center[j] == pytest.approx(s.median())
        assert scaler.scale[j] == pytest.approx((s.quantile(0.75) - s.quantile(0.25)) / 1.349)
    out = scaler.transform(values)
    assert out.dtype == np.float32
    np.testing.assert_allclose(np.nanmedian(out, axis=0), 0.0, atol=1e-6)
    assert RobustScaler.from_json(scaler.to_json()) == scaler


def test_spans_are_chronological_with_the_calibration_held_back(write_csv):
    frame = load_frame(write_csv(correlated_series(1000)))
    spans = split_spans(frame, 600, 0.25)
    assert spans.fit == (0, 450) and spans.calibration == (450, 600) and spans.rest == (600, 1000)
    assert split_spans(frame, 0.5, 0.2).calibration == (400, 500)
    assert split_spans(frame, str(frame.times[599]), 0.25) == spans
    assert split_spans(frame, None, 0.2).rest == (1000, 1000)
    with pytest.raises(IntakeError, match="leaves no training rows"):
        split_spans(frame, "2020-01-01", 0.2)
    with pytest.raises(IntakeError, match="give a row count, a fraction"):
        split_spans(frame, "not a time", 0.2)


def test_a_row_count_counts_the_files_rows_not_the_grids(write_csv):
    """--train-until 300 on a file missing one second in ten trains on the file's first 300
    rows: the grid's filled gaps do not count as rows (they did: SKAB's first 400 grid points
    end at its file's row ~381). Reference: the rows pandas.read_csv reads from the same file."""
    df = correlated_series(1000)
    df = df.drop(index=np.arange(5, 1000, 10)).reset_index(drop=True)   # 900 rows, 1000 s
    path = write_csv(df, "holes.csv")
    frame = load_frame(path)
    assert len(frame.values) == 1000 and frame.report.filled_points == 100
    rows = pd.read_csv(path)
    spans = split_spans(frame, 300, 0.2)
    assert frame.times[spans.rest[0] - 1] == pd.Timestamp(rows["time"].iloc[299])
    assert spans == split_spans(frame, str(rows["time"].iloc[299]), 0.2)
    assert spans.rest[0] == 333                         # 300 rows, 33 holes filled among them
    said = spans_summary(frame, spans)                  # what `ganlet train` prints
    assert "300 rows of the file, 333 grid points" in said and "untrained" in said
    assert "900 rows of the file" in spans_summary(frame, split_spans(frame, None, 0.2))
    assert split_spans(frame, 900, 0.2).rest == (1000, 1000)
    assert split_spans(frame, 5000, 0.2).rest == (1000, 1000)


def test_scaler_and_weights_see_the_fit_span_only(write_csv):
    df = correlated_series(500)
    frame = load_frame(write_csv(df, "a.csv"))
    spans = split_spans(frame, 400, 0.2)                 # fit (0, 320)
    changed = df.copy()
    changed.loc[320:, CHANNELS] = changed.loc[320:, CHANNELS] * 10 + 7
    frame_b = load_frame(write_csv(changed, "b.csv"))
    cfg = TeacherConfig(window=16, encoder_hidden=(4,), generator_hidden=(4,),
                         discriminator_hidden=4, adversarial_epochs=1, inversion_epochs=1)
    a, b = train(frame, spans, cfg), train(frame_b, spans, cfg)
    assert a.scaler == b.scaler
    sa, sb = a.teacher.encoder.state_dict(), b.teacher.encoder.state_dict()
    assert all(np.array_equal(sa[k].numpy(), sb[k].numpy()) for k in sa)
    inside = df.copy()
    inside.loc[:100, "flow"] += 3.0                      # a change inside the fit span does show
    c = train(load_frame(write_csv(inside, "c.csv")), spans, cfg)
    assert c.scaler != a.scaler


def test_too_few_points_says_how_many_are_needed(write_csv):
    frame = load_frame(write_csv(correlated_series(50)))
    with pytest.raises(IntakeError, match="too few points for any usable window") as info:
        choose_window(frame, split_spans(frame, None, 0.2), 32)
    needed = int(re.search(r"about (\d+) gap-free training points", str(info.value)).group(1))
    assert needed > 50
    enough = load_frame(write_csv(correlated_series(needed), "enough.csv"))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert choose_window(enough, split_spans(enough, None, 0.2), 32) >= 8


def test_a_channel_logged_slower_than_the_others_is_named_with_what_to_do(write_csv):
    df = correlated_series(400)
    df.loc[df.index % 10 != 0, "flow"] = np.nan       # flow on every tenth row only
    frame = load_frame(write_csv(df))
    assert frame.report.blank_cells["flow"] == 360 and frame.report.blank_cells["power"] == 0
    with pytest.raises(IntakeError, match="too few points") as info:
        choose_window(frame, split_spans(frame, None, 0.2), 32)
    assert "'flow' on 360 of 400 grid points" in str(info.value)
    assert "leave it out with --exclude flow, or keep it with --max-fill 9 " in str(info.value)
    without = load_frame(write_csv(df.drop(columns="flow"), "without.csv"))
    assert choose_window(without, split_spans(without, None, 0.2), 32) == 32
    # the --max-fill it names keeps the channel: its blanks filled by straight lines between
    # its readings (pandas linear interpolation as the reference), the window the one asked for
    kept = load_frame(write_csv(df, "kept.csv"), IntakeOptions(max_fill_periods=9))
    assert choose_window(kept, split_spans(kept, None, 0.2), 32) == 32
    lines = df["flow"].interpolate(method="linear", limit_area="inside").to_numpy()
    np.testing.assert_allclose(kept.values[:391, 0], lines[:391], rtol=1e-12)


def test_no_max_fill_is_named_for_a_channel_whose_blanks_outlast_a_window(write_csv):
    df = correlated_series(400)
    df.loc[df.index % 40 != 0, "flow"] = np.nan       # flow on every fortieth row only
    frame = load_frame(write_csv(df))
    assert frame.report.blank_runs["flow"] == 39
    with pytest.raises(IntakeError, match="too few points") as info:
        choose_window(frame, split_spans(frame, None, 0.2), 32)
    assert str(info.value).endswith("leave it out with --exclude flow")


def test_short_history_picks_a_shorter_window_with_a_warning(write_csv):
    frame = load_frame(write_csv(correlated_series(400)))
    spans = split_spans(frame, None, 0.2)                # fit 320 points, calibration 80
    with pytest.warns(UserWarning, match="short history: using a window of 72 points instead of 128"):
        assert choose_window(frame, spans, 128) == 72
    with warnings.catch_warnings():
        warnings.simplefilter("error")                   # the default window fits: no warning
        assert choose_window(frame, spans, 32) == 32
    small = load_frame(write_csv(correlated_series(120), "small.csv"))
    with pytest.warns(UserWarning, match="short history"):
        assert choose_window(small, split_spans(small, None, 0.2), 32) == 16


def test_a_period_far_finer_than_the_data_is_refused(tmp_path):
    """--period 0.001 on 1-minute data would allocate a grid of millions of empty points."""
    path = tmp_path / "minute.csv"
    pd.DataFrame({"time": pd.date_range("2026-01-01", periods=200, freq="60s"),
                  "a": np.arange(200.0), "b": np.sin(np.arange(200.0))}).to_csv(path, index=False)
    with pytest.raises(IntakeError, match="median spacing is 1 min"):
        load_frame(path, IntakeOptions(period_s=0.001))


# ------------------------------------------------------------------------------------------
# dialects and zones, read by the gateway's own rules (issue 13 section 3)


def test_offsets_that_change_mid_file_are_read_as_utc(write_csv):
    """Summer time: +01:00 then +02:00 in one column; one regular UTC grid, no pandas error."""
    df = correlated_series(300, period_s=600)
    utc = pd.date_range("2026-03-28T20:00", periods=300, freq="10min", tz="UTC")
    # reference: pandas converts each UTC time to Europe/Berlin with its offset of the day
    local = utc.tz_convert("Europe/Berlin")
    df["time"] = [ts.isoformat() for ts in local]
    assert {t[-6:] for t in df["time"]} == {"+01:00", "+02:00"}
    frame = load_frame(write_csv(df))
    assert (frame.times == utc.tz_localize(None)).all() and frame.report.grid_points == 300


def test_zoneless_local_times_with_tz(write_csv):
    df = correlated_series(200)
    utc = pd.date_range("2026-01-05", periods=200, freq="60s", tz="UTC")
    df["time"] = utc.tz_convert("Europe/Berlin").strftime("%Y-%m-%d %H:%M:%S")
    frame = load_frame(write_csv(df), IntakeOptions(tz="Europe/Berlin"))
    assert (frame.times == utc.tz_localize(None)).all()  # reference: pandas tz_convert
    assert frame.report.time_zone == "Europe/Berlin"
    with pytest.raises(IntakeError, match="unknown here"):
        load_frame(write_csv(df), IntakeOptions(tz="Nowhere/Atlantis"))


def test_decimal_comma_is_an_option_and_its_absence_is_named(write_csv):
    df = correlated_series(100)
    path = write_csv(df, sep=";", decimal=",")
    with pytest.raises(IntakeError, match="hold numbers with a decimal comma .*--decimal ','"):
        load_frame(path)
    frame = load_frame(path, IntakeOptions(decimal=","))
    assert frame.channels == CHANNELS
    # reference: pandas.read_csv told the separator and the decimal mark
    expected = pd.read_csv(path, sep=";", decimal=",")[CHANNELS].to_numpy()
    np.testing.assert_allclose(frame.values, expected)


def test_the_training_zone_is_kept_with_the_model(write_csv, tmp_path, one_torch_thread):
    from ganlet.compile.train import load_model, save_model

    df = correlated_series(300)
    df["time"] = df["time"].dt.strftime("%d.%m.%Y %H:%M")
    frame = load_frame(write_csv(df), IntakeOptions(tz="America/New_York", date_order="dayfirst"))
    cfg = TeacherConfig(window=16, encoder_hidden=(4,), generator_hidden=(4,),
                        discriminator_hidden=4, adversarial_epochs=1, inversion_epochs=1)
    model = train(frame, split_spans(frame, None, 0.2), cfg)
    assert model.time_zone == "America/New_York"
    assert load_model(save_model(model, tmp_path / "m")).time_zone == "America/New_York"
