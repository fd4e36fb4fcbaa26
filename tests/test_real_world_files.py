"""Real-world files on the workstation: a `;` file with decimal commas is named for what it is,
and a time column whose UTC offset changes mid-file (summer time) is read onto one UTC grid."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
from synthetic import correlated_series

from ganlet.compile.data import IntakeError, IntakeOptions, load_frame


@pytest.mark.parametrize("options", [IntakeOptions(), IntakeOptions(sep=";"),
                                     IntakeOptions(channels=["flow", "power"])],
                         ids=["sniffed", "sep given", "channels given"])
def test_decimal_commas_are_named_not_the_delimiter(write_csv, options):
    # reference: pandas.DataFrame.to_csv(sep=";", decimal=",") writes the continental dialect
    path = write_csv(correlated_series(200), sep=";", decimal=",")
    assert "10," in path.read_text().splitlines()[1]          # precondition: commas written
    with pytest.raises(IntakeError) as err:
        load_frame(path, options)
    message = str(err.value)
    assert "decimal comma" in message and "--decimal ','" in message
    assert "--sep" not in message
    assert "flow" in message


def grouped(values, sep: str, point: str) -> list:
    """Each value as a spreadsheet formats it with digit grouping (reference: Python's format
    specification, PEP 378: `f"{v:,.1f}"`), separators swapped for the continental dialect."""
    return [f"{v:,.1f}".replace(",", "\0").replace(".", point).replace("\0", sep)
            for v in values]


@pytest.mark.parametrize("dialect", ["point", "comma"])
def test_numbers_grouped_in_thousands_are_refused_naming_the_column(write_csv, dialect):
    # an export formatted 1,234.5 (or 1.234,5): read as text the speed would be left out, and
    # with plain numbers under 1,000 beside them its large values would read as blank
    df = correlated_series(300)
    df["speed"] = 1000 + 150 * (df["flow"] - 10)           # about 600 to 1,400 rpm
    assert (df["speed"] < 1000).any() and (df["speed"] >= 1000).any()
    if dialect == "point":
        df["speed"] = grouped(df["speed"], ",", ".")
        path, options, thousands = write_csv(df), IntakeOptions(), ","
    else:
        df["speed"] = grouped(df["speed"], ".", ",")
        path = write_csv(df, sep=";", decimal=",")
        options, thousands = IntakeOptions(sep=";", decimal=","), "."
    # reference: pandas.read_csv reads the column as numbers only when told the grouping
    told = pd.read_csv(path, sep=options.sep or ",", decimal=options.decimal,
                       thousands=thousands)["speed"]
    assert pd.api.types.is_float_dtype(told) and told.max() > 1000
    with pytest.raises(IntakeError) as err:
        load_frame(path, options)
    message = str(err.value)
    assert "speed" in message and "grouped in thousands" in message and "plain numbers" in message
    with pytest.raises(IntakeError, match="grouped in thousands"):
        load_frame(path, IntakeOptions(sep=options.sep, decimal=options.decimal,
                                       channels=["flow", "speed"]))


@pytest.mark.parametrize("tag", ["names", "numbers"])
def test_one_reading_per_row_is_refused_with_the_pivot_that_fixes_it(write_csv, tag):
    # a historian's narrow export (reference: pandas.DataFrame.melt writes that shape from the
    # wide frame): read as it stands, the three sensors at each time were averaged into one
    # channel "value"; a numeric tag id was even a channel of its own
    wide = correlated_series(300)
    narrow = wide.melt(id_vars="time", var_name="tag", value_name="value").sort_values("time")
    if tag == "numbers":
        narrow["tag"] = narrow["tag"].map({"flow": 101, "power": 102, "temp": 103})
    path = write_csv(narrow, name="narrow.csv")
    with pytest.raises(IntakeError) as err:
        load_frame(path)
    message = str(err.value)
    assert "'tag'" in message and "one reading per row" in message and "pivot_table" in message
    # the pivot the message gives restores a file that reads as the wide one does
    pivoted = pd.read_csv(path).pivot_table(index="time", columns="tag",
                                            values="value").reset_index()
    frame = load_frame(write_csv(pivoted, name="pivoted.csv"))
    assert frame.values.shape == (300, 3)
    order = ["flow", "power", "temp"] if tag == "names" else ["101", "102", "103"]
    assert frame.channels == order
    np.testing.assert_allclose(frame.values, wide[["flow", "power", "temp"]].to_numpy(),
                               rtol=1e-12)


@pytest.mark.parametrize("counter", ["pandas index", "sample number"])
def test_a_row_number_column_is_left_out_and_said(tmp_path, counter):
    # reference: pandas.DataFrame.to_csv writes the frame's index as a first column with an
    # empty header (index=True is its default), and pandas.read_csv names it "Unnamed: 0";
    # files shared as CSV often carry it. It was trained on as a channel: 0, 1, 2 ... is a
    # level the gateway never saw again, a drift from the first hop
    df = correlated_series(300)
    rng = np.random.default_rng(0)
    df["strokes"] = np.cumsum(rng.integers(0, 3, len(df)))  # a measured count: steps of 0-2
    path = tmp_path / "data.csv"
    if counter == "pandas index":
        df.to_csv(path)
    else:
        df.insert(0, "sample", np.arange(1, len(df) + 1))
        df.to_csv(path, index=False)
    name = pd.read_csv(path).columns[0]
    assert name == ("Unnamed: 0" if counter == "pandas index" else "sample")
    with pytest.warns(UserWarning, match=f"'{name}' counts the rows .* a row number"):
        frame = load_frame(path)
    assert frame.channels == ["flow", "power", "temp", "strokes"]
    assert name in frame.report.excluded
    kept = load_frame(path, IntakeOptions(channels=[name, "flow"]))  # named, it is a channel
    np.testing.assert_array_equal(kept.values[:, 0], pd.read_csv(path)[name].to_numpy())


@pytest.mark.parametrize("order, form", [("dayfirst", "%d/%m/%Y %H:%M:%S"),
                                         ("monthfirst", "%m/%d/%Y %H:%M:%S")])
def test_a_date_column_that_settles_its_own_order_names_the_flag(write_csv, order, form):
    # numeric dates with the year last are still asked for (03/04/2026 alone says nothing), but
    # a column with a day past 12 reads only one way, and the error now says which. Reference:
    # the cells are datetime.strftime's, and pandas.to_datetime(format=...) reads them back
    df = correlated_series(30 * 24, period_s=3600)  # 5 Jan .. 3 Feb: days past 12
    df["time"] = df["time"].dt.strftime(form)
    path = write_csv(df)
    with pytest.raises(IntakeError, match=f"reads only as .* train with --{order}; the bundle"):
        load_frame(path)
    frame = load_frame(path, IntakeOptions(date_order=order))
    expected = pd.to_datetime(pd.read_csv(path)["time"], format=form)
    np.testing.assert_array_equal(frame.row_times, expected.to_numpy())
    early = df.iloc[:24 * 7].copy()  # 5 .. 11 January: either order reads every cell
    with pytest.raises(IntakeError) as err:
        load_frame(write_csv(early, name="early.csv"))
    assert "only you know" in str(err.value) and "reads only as" not in str(err.value)


@pytest.mark.parametrize("line", ["sep=;", '"sep=;"', "SEP=;"])
def test_a_spreadsheets_separator_line_names_the_separator_and_is_skipped(tmp_path, line):
    # a spreadsheet may write `sep=;` above a CSV's header to name its separator; it was read
    # as the header (columns 'sep=' and 'Unnamed: 1', the real header taken for a units row).
    # Reference: pandas.read_csv(sep=";", skiprows=1) reads the table under the line
    df = correlated_series(200)
    path = tmp_path / "excel.csv"
    path.write_text(line + "\n" + df.to_csv(sep=";", decimal=",", index=False))
    frame = load_frame(path, IntakeOptions(decimal=","))
    expected = pd.read_csv(path, sep=";", decimal=",", skiprows=1)
    assert frame.channels == ["flow", "power", "temp"]
    np.testing.assert_array_equal(frame.values, expected[frame.channels].to_numpy())
    with pytest.raises(IntakeError, match="first line says the separator is ';'"):
        load_frame(path, IntakeOptions(sep="|", decimal=","))


def test_spreadsheet_serial_dates_are_refused_with_the_conversion(write_csv):
    # days since 1899-12-30 (45413.0007 = 2024-05-01 00:01) had been read as epoch seconds: a
    # 0.0007 s grid on 1 January 1970. Reference: the conversion the message gives,
    # pandas.to_datetime(unit="D", origin="1899-12-30"), reads the times back
    df = correlated_series(300)
    serial = (df["time"] - pd.Timestamp("1899-12-30")) / pd.Timedelta("1D")
    path = write_csv(df.assign(time=serial))
    with pytest.raises(IntakeError, match="spreadsheet serial dates") as err:
        load_frame(path)
    assert "2026-01-05 00:00:00" in str(err.value)
    back = pd.to_datetime(pd.read_csv(path)["time"], unit="D", origin="1899-12-30")
    assert (back - df["time"]).abs().max() < pd.Timedelta("1ms")
    # small epoch seconds (a series numbered 1, 2, 3 ... as seconds) still read as before
    frame = load_frame(write_csv(df.assign(time=np.arange(1, 301)), name="seconds.csv"))
    assert frame.period_s == 1.0 and len(frame.times) == 300


@pytest.mark.parametrize("name", ["faultNumber", "is_outlier", "Pump1_Fault", "Normal/Attack"])
def test_a_column_whose_name_says_label_is_left_out_and_found_by_evaluate(write_csv, name):
    # a 0/1 label named outside the exact list (a simulator's faultNumber, a historian's
    # Pump1_Fault bit) had been trained on as a channel: the detector then reads the answer
    # from the feed. Reference: the runs of labelled rows as pandas reads them
    from ganlet.compile.evaluate import incidents_in_file

    df = correlated_series(300)
    marked = np.zeros(len(df), bool)
    marked[200:230] = True
    df[name] = np.where(marked, "Attack", "Normal") if name == "Normal/Attack" else marked * 1
    df["default_rate"] = np.linspace(0, 1, len(df)) ** 2  # 'fault' inside a word: a channel
    path = write_csv(df)
    with pytest.warns(UserWarning, match=f"'{name}' is taken for a label"):
        frame = load_frame(path)
    assert frame.channels == ["flow", "power", "temp", "default_rate"]
    assert name in frame.report.excluded
    incidents, column = incidents_in_file(path, None, IntakeOptions())
    assert column == name and len(incidents) == 1
    read = pd.read_csv(path)
    assert incidents["start"][0] == pd.Timestamp(read["time"][200])
    assert incidents["end"][0] == pd.Timestamp(read["time"][229])


def test_rows_without_times_are_samples_at_the_given_period_and_times_still_win(write_csv):
    # reference: pandas.date_range from the epoch at the period given; a file that has a time
    # column keeps reading it (--period then only sets the grid)
    from ganlet.compile.pipeline import TrainOptions

    timed = correlated_series(300)
    rows = write_csv(timed.drop(columns="time"), name="rows.csv")
    with pytest.warns(UserWarning, match="no time column: each of the 300 rows"):
        frame = load_frame(rows, TrainOptions(period="1min").intake())
    expected = pd.date_range("1970-01-01", periods=300, freq="60s")
    np.testing.assert_array_equal(frame.times.tz_localize(None).values, expected.values)
    np.testing.assert_allclose(frame.values, timed[["flow", "power", "temp"]].to_numpy())
    assert frame.report.times_from_rows and frame.report.time_col == "time"
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        kept = load_frame(write_csv(timed), TrainOptions(period="1min").intake())
    assert not kept.report.times_from_rows and str(kept.times[0]).startswith("2026-01-05")


def test_a_wide_file_with_some_repeated_times_is_not_taken_for_one_reading_per_row(write_csv):
    # a logger that wrote a few rows twice: averaged and said, as before
    df = correlated_series(300)
    df = pd.concat([df, df.iloc[:40]]).sort_values("time")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        frame = load_frame(write_csv(df))
    assert frame.report.duplicates == 40 and frame.channels == ["flow", "power", "temp"]


def test_a_12_hour_clock_export_trains_on_the_times_pandas_reads(write_csv):
    # a US spreadsheet export: 6/1/2025 1:05:00 PM; refused before stop 36 (bad time of day)
    df = correlated_series(300)
    df["time"] = df["time"].dt.strftime("%m/%d/%Y %I:%M:%S %p")
    path = write_csv(df)
    with pytest.raises(IntakeError, match="--monthfirst"):
        load_frame(path)  # the date's order is still asked for
    frame = load_frame(path, IntakeOptions(date_order="monthfirst"))
    # reference: pandas.to_datetime with the C format's %I (12-hour clock) and %p
    expected = pd.to_datetime(pd.read_csv(path)["time"], format="%m/%d/%Y %I:%M:%S %p")
    assert list(pd.DatetimeIndex(frame.times)) == list(expected)


def test_text_columns_without_decimal_commas_keep_the_general_message(write_csv):
    df = correlated_series(50)
    df["flow"] = "off"                   # text, but not numbers with a decimal comma
    df["power"] = "off"
    df["temp"] = "off"
    with pytest.raises(IntakeError, match="no numeric channel found"):
        load_frame(write_csv(df))


def test_a_quality_flag_among_numbers_is_read_as_blank_and_said(write_csv):
    # a historian's export: "Bad" where the pressure transmitter's quality was bad. The column
    # stays a channel, the flags are blank cells (reference: pandas.read_csv with
    # na_values=["Bad"]), and the note says how many, as the gateway reads them
    # (runtime/intake.py); a column of text (a site name) is left out, and said
    df = correlated_series(300)
    df["power"] = df["power"].round(3).astype(object)
    df.loc[[10, 11, 200], "power"] = "Bad"
    df["site"] = "pump 3"
    path = write_csv(df)
    with warnings.catch_warnings(record=True) as said:
        warnings.simplefilter("always")
        frame = load_frame(path, IntakeOptions(max_fill_periods=5))
    text = [str(w.message) for w in said]
    assert "channel 'power': 3 of 300 cells hold text ('Bad'), read as blank, as the gateway " \
           "reads them" in text
    assert "column 'site' holds text, not numbers: left out" in text
    assert frame.channels == ["flow", "power", "temp"] and "site" in frame.report.excluded
    assert frame.report.blank_cells["power"] == 3
    reference = pd.read_csv(path, na_values=["Bad"])["power"].to_numpy()
    assert np.isnan(reference[[10, 11, 200]]).all()
    # the three blanks are short gaps, filled by straight lines; every other cell as read
    kept = np.setdiff1d(np.arange(300), [10, 11, 200])
    np.testing.assert_allclose(frame.values[kept, 1], reference[kept], rtol=1e-12)
    np.testing.assert_allclose(frame.values[10:12, 1], np.interp(
        [10, 11], [9, 12], reference[[9, 12]]), rtol=1e-12)
    # the same file in the continental dialect (";" between cells, "," before decimals; the
    # times hold neither): the flags leave the column text to pandas, its numbers still read
    comma = path.with_name("comma.csv")
    comma.write_text(path.read_text().replace(",", ";").replace(".", ","))
    assert ";Bad;" in comma.read_text() and ",5" in comma.read_text()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        continental = load_frame(comma, IntakeOptions(decimal=",", max_fill_periods=5))
    np.testing.assert_allclose(continental.values, frame.values, rtol=1e-12)


def _local_times(utc: pd.DatetimeIndex, zone: str) -> list:
    # reference: pandas tz_convert with the IANA zone database gives the local wall clock and
    # its offset; isoformat writes them as a logger with a UTC offset does
    return [t.isoformat() for t in utc.tz_convert(zone)]


@pytest.mark.parametrize("start", ["2025-03-30T00:00:00Z", "2025-10-26T00:00:00Z"],
                         ids=["spring forward +01:00 -> +02:00", "fall back +02:00 -> +01:00"])
def test_offsets_changing_mid_file_are_read_as_utc(write_csv, start):
    utc = pd.date_range(start, periods=240, freq="60s")
    df = correlated_series(240)
    df["time"] = _local_times(utc, "Europe/Berlin")
    offsets = {t[-6:] for t in df["time"]}
    assert offsets == {"+01:00", "+02:00"}                      # precondition: both offsets
    with warnings.catch_warnings():
        warnings.simplefilter("error")                          # no warning either
        frame = load_frame(write_csv(df))
    expected = utc.tz_convert("UTC").tz_localize(None)
    np.testing.assert_array_equal(frame.times.to_numpy(), expected.to_numpy())
    rep = frame.report
    assert (rep.period_s, rep.grid_points, rep.duplicates, rep.out_of_order) == (60.0, 240, 0, 0)
    assert rep.long_gaps == [] and rep.filled_points == 0
    np.testing.assert_allclose(frame.values, df[["flow", "power", "temp"]].to_numpy())


def test_cells_pythons_float_reads_but_pandas_does_not_are_blank_on_both_sides(tmp_path):
    # Python's float() reads "1_000" (PEP 515), other scripts' digits and "NAN"; pandas.read_csv
    # reads them as text, so training takes them as blank cells. The gateway read them as
    # numbers (1000, 123, 12) until its number rule became pandas'.
    from ganlet.runtime.sources import CsvSource

    odd = ["1_000", "\u0661\u0662\u0663", "NAN", "\uff11\uff12", "0x10", "1e"]
    fine = ["1.", ".5", "+3", "1E+05", "-2e-3", "007"]
    cells = odd + fine
    for cell in cells:  # reference: pandas.read_csv, a column of this cell and one number
        column = pd.read_csv(pd.io.common.StringIO(f"a\n{cell}\n5\n"))["a"]
        assert pd.api.types.is_numeric_dtype(column) == (cell in fine), cell
    times = pd.date_range("2024-01-01", periods=60, freq="1s").strftime("%Y-%m-%dT%H:%M:%SZ")
    df = pd.DataFrame({"time": times, "a": np.arange(60) + 0.5, "b": np.arange(60) * 2.0})
    df["a"] = df["a"].astype(object)
    df.loc[10:10 + len(cells) - 1, "a"] = cells
    path = tmp_path / "odd.csv"
    df.to_csv(path, index=False)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        frame = load_frame(path, IntakeOptions(max_fill_periods=10))
    assert frame.report.blank_cells["a"] == len(odd)
    with open(path, "rb") as fh:
        rows = [r for r in CsvSource(fh, "time", ["a", "b"]) if r.header is None]
    read = {r.lineno - 2: r for r in rows}  # data row k is on line k + 2
    for k, cell in enumerate(cells, start=10):
        rec = read[k]
        assert rec.error is None, (cell, rec.error)
        if cell in odd:
            assert np.isnan(rec.values[0]) and rec.text_cells == 1, cell
        else:
            assert rec.values[0] == pytest.approx(float(cell)), cell
            assert rec.values[0] == pytest.approx(frame.values[k, 0]), cell
