"""The invented demo pump station: shape, determinism, data-quality faults, and incident effects.

Every check reads the CSVs back with pandas (the external reference), not the generator's arrays.
"""

import importlib.util
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

EXAMPLE = Path(__file__).resolve().parent.parent / "examples" / "pump_station.py"
COLUMNS = ["time", "vibration_mm_s", "bearing_temp_c", "discharge_bar", "motor_current_a"]
KINDS = {"bearing_wear", "cavitation", "stuck_sensor", "pressure_sag"}
MINUTE = pd.Timedelta("1min")


def _module():
    spec = importlib.util.spec_from_file_location("pump_station", EXAMPLE)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


ps = _module()


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo")
    info = ps.generate(out)
    # reference: pandas.read_csv / pandas.to_datetime with an explicit ISO 8601 format
    raw = pd.read_csv(info["data"])
    raw["time"] = pd.to_datetime(raw["time"], format="%Y-%m-%dT%H:%M:%S")
    inc = pd.read_csv(info["incidents"])
    for col in ("start", "end"):
        inc[col] = pd.to_datetime(inc[col], format="%Y-%m-%dT%H:%M:%S")
    clean = raw.sort_values("time", kind="stable").drop_duplicates("time", keep="first")
    clean = clean.set_index("time")
    inside = np.zeros(len(clean), dtype=bool)
    for row in inc.itertuples():
        inside |= (clean.index >= row.start) & (clean.index <= row.end)
    # Duty state from the current alone (off < 5 A, low stage 10-25 A, high stage > 30 A).
    duty = pd.cut(clean["motor_current_a"], [-1, 5, 25, 1e9], labels=["off", "low", "high"])
    return {"info": info, "raw": raw, "inc": inc, "clean": clean, "inside": inside, "duty": duty}


def test_columns_rows_and_no_label(demo):
    raw, info = demo["raw"], demo["info"]
    assert list(raw.columns) == COLUMNS
    assert not any("label" in c or "anomal" in c or "incident" in c for c in raw.columns)
    # 7 days of 1-minute samples, minus 3 + 40 missing, plus 2 duplicate rows
    assert len(raw) == info["rows"] == 7 * 1440 - 3 - 40 + 2
    # every cell holds a number but the dead transmitter's (test_a_dead_transmitter_...)
    assert raw[[c for c in COLUMNS[1:] if c != ps.DEAD_TRANSMITTER]].notna().all().all()
    assert (raw["motor_current_a"].dropna() >= 0).all() and (raw["vibration_mm_s"] > 0).all()
    text = Path(info["data"]).read_text().splitlines()
    assert text[1].startswith("2026-03-02T00:00:00,")


def test_deterministic_under_seed(tmp_path, demo):
    a = ps.generate(tmp_path / "a", seed=7)
    b = ps.generate(tmp_path / "b", seed=8)
    ref = demo["info"]
    assert Path(a["data"]).read_bytes() == Path(ref["data"]).read_bytes()
    assert Path(a["incidents"]).read_bytes() == Path(ref["incidents"]).read_bytes()
    assert Path(b["data"]).read_bytes() != Path(ref["data"]).read_bytes()


def test_split_and_incidents_in_last_40_percent(demo):
    info, inc, raw = demo["info"], demo["inc"], demo["raw"]
    t0, t1 = raw["time"].min(), raw["time"].max()
    boundary = t0 + 0.6 * (t1 - t0)
    train_end, test_start = pd.Timestamp(info["train_end"]), pd.Timestamp(info["test_start"])
    assert test_start - train_end == MINUTE
    assert abs(test_start - boundary) <= 2 * MINUTE
    assert set(inc.columns) == {"start", "end", "kind"}
    assert set(inc["kind"]) == KINDS and 3 <= len(inc) <= 6
    assert (inc["start"] >= test_start).all() and (inc["end"] <= t1).all()
    assert (inc["end"] > inc["start"]).all()
    assert (inc["start"].iloc[1:].to_numpy() > inc["end"].iloc[:-1].to_numpy()).all()  # no overlap


def test_data_quality_faults_exist(demo):
    raw, info = demo["raw"], demo["info"]
    # reference: pandas.Series.diff / pandas.Series.duplicated
    steps = raw["time"].diff().dropna()
    backwards = int((steps < pd.Timedelta(0)).sum())
    assert 3 <= backwards <= 6
    dup_mask = raw["time"].duplicated(keep=False)
    assert raw.loc[dup_mask, "time"].nunique() == 2
    dups = raw[dup_mask].groupby("time")
    exact = sum(int(g.drop_duplicates().shape[0] == 1) for _, g in dups)
    assert exact == 1  # one exact re-send, one second poll with different values
    gaps = demo["clean"].index.to_series().diff().dropna()
    assert (gaps == MINUTE).sum() == len(gaps) - 2
    assert sorted(gaps[gaps != MINUTE]) == [4 * MINUTE, 41 * MINUTE]  # 3 and 40 missing
    long_start = gaps[gaps == 41 * MINUTE].index[0]
    assert long_start > pd.Timestamp(info["test_start"])  # the outage is in the test span
    # no incident overlaps a missing stretch
    for row in demo["inc"].itertuples():
        span = demo["clean"].loc[row.start : row.end]
        assert len(span) == (row.end - row.start) / MINUTE + 1


def test_a_dead_transmitter_in_the_test_span_away_from_the_incidents(demo):
    raw, info = demo["raw"], demo["info"]
    blank = raw.loc[raw[ps.DEAD_TRANSMITTER].isna(), "time"]
    # reference: pandas.isna; two hours of one-minute rows in one run, the other cells read
    assert len(blank) == 120 and (blank.diff().dropna() == MINUTE).all()
    assert blank.min() > pd.Timestamp(info["test_start"])
    assert raw.loc[raw[ps.DEAD_TRANSMITTER].isna(), COLUMNS[1:4]].notna().all().all()
    for row in demo["inc"].itertuples():  # an hour clear of every incident on either side
        assert blank.max() + 60 * MINUTE < row.start or blank.min() - 60 * MINUTE > row.end


def test_duty_cycle_structure(demo):
    clean, duty = demo["clean"], demo["duty"]
    train = clean.index < pd.Timestamp(demo["info"]["test_start"])
    share = duty[train].value_counts(normalize=True)
    assert share["off"] > 0.1 and share["low"] > 0.3 and share["high"] > 0.15
    med = clean[train].groupby(duty[train], observed=True).median()
    # pressure, vibration and heat all rise with the duty stage
    for col in ("discharge_bar", "vibration_mm_s", "bearing_temp_c"):
        assert med.loc["off", col] < med.loc["low", col] < med.loc["high", col], col
    # reference: pandas.Series.corr (Pearson); current and pressure follow the duty together
    assert clean.loc[train, "motor_current_a"].corr(clean.loc[train, "discharge_bar"]) > 0.9
    # bearing temperature lags load: it correlates better with current 30 min earlier than now
    cur = clean.loc[train, "motor_current_a"]
    temp = clean.loc[train, "bearing_temp_c"]
    assert temp.corr(cur.shift(30)) > temp.corr(cur)
    starts = int(((duty != "off") & (duty.shift(1) == "off")).sum())
    assert starts >= 2 * 7  # at least two starts a day


def _incident(demo, kind, k=0):
    row = demo["inc"][demo["inc"]["kind"] == kind].iloc[k]
    sel = (demo["clean"].index >= row.start) & (demo["clean"].index <= row.end)
    return sel


def _training(demo):
    return demo["clean"].index < pd.Timestamp(demo["info"]["test_start"])


def test_stuck_sensor_freezes_discharge_while_current_moves(demo):
    clean = demo["clean"]
    sel = _incident(demo, "stuck_sensor")
    assert clean.loc[sel, "discharge_bar"].nunique() == 1  # one repeated reading
    assert clean.loc[sel, "motor_current_a"].std() > 1.0
    assert demo["duty"][sel].nunique() >= 2  # the pump changed state under the frozen reading
    # outside the incident the reading never repeats for long
    out = clean.loc[~sel, "discharge_bar"]
    run_id = (out != out.shift()).cumsum()
    assert out.groupby(run_id).size().max() < 10


def test_pressure_sag_at_normal_current(demo):
    clean, duty, inside = demo["clean"], demo["duty"], demo["inside"]
    sel = _incident(demo, "pressure_sag")
    state = duty[sel].mode().iloc[0]
    assert (duty[sel] == state).mean() > 0.95
    same = (duty == state).to_numpy() & ~inside
    assert clean.loc[sel, "discharge_bar"].median() < 0.9 * clean.loc[same, "discharge_bar"].median()
    ratio = clean.loc[sel, "motor_current_a"].median() / clean.loc[same, "motor_current_a"].median()
    assert 0.95 < ratio < 1.05


@pytest.mark.parametrize("k", [0, 1])
def test_cavitation_bursts_spike_vibration_and_dip_pressure(demo, k):
    clean, duty = demo["clean"], demo["duty"]
    sel = _incident(demo, "cavitation", k)
    # steady high stage in training: same state three samples either side (no ramps)
    steady = (duty == duty.shift(3)) & (duty == duty.shift(-3))
    high = _training(demo) & (duty == "high").to_numpy() & steady.to_numpy()
    assert (duty[sel] == "high").mean() > 0.9
    assert clean.loc[sel, "vibration_mm_s"].max() > 1.5 * clean.loc[high, "vibration_mm_s"].quantile(0.999)
    assert clean.loc[sel, "vibration_mm_s"].std() > 3 * clean.loc[high, "vibration_mm_s"].std()
    assert clean.loc[sel, "discharge_bar"].min() < clean.loc[high, "discharge_bar"].quantile(0.001) - 0.3
    # the dips come with the spikes: samples with spiking vibration sit well below normal pressure
    spiking = sel & (clean["vibration_mm_s"] > clean.loc[high, "vibration_mm_s"].quantile(0.999)).to_numpy()
    assert spiking.sum() >= 5
    assert clean.loc[spiking, "discharge_bar"].median() < clean.loc[high, "discharge_bar"].median() - 0.3


def test_bearing_wear_raises_vibration_and_temperature(demo):
    clean = demo["clean"]
    sel = _incident(demo, "bearing_wear")
    train = clean[_training(demo)]
    tod = clean.index.hour * 60 + clean.index.minute
    # compare against the same time of day on the normal days
    ref = train.groupby(train.index.hour * 60 + train.index.minute).median()
    part = clean[sel]
    resid_t = part["bearing_temp_c"].to_numpy() - ref.loc[tod[sel], "bearing_temp_c"].to_numpy()
    ratio_v = part["vibration_mm_s"].to_numpy() / ref.loc[tod[sel], "vibration_mm_s"].to_numpy()
    assert pd.Series(resid_t).rolling(30).median().max() > 5.0  # degrees C above normal
    assert pd.Series(ratio_v).rolling(30).median().max() > 1.6
    # the ramp is gradual: the first hour is still close to normal
    assert np.median(ratio_v[:60]) < 1.2


def test_other_spans_and_bad_arguments(tmp_path):
    info = ps.generate(tmp_path / "five", days=5, seed=3)
    inc = pd.read_csv(info["incidents"], parse_dates=["start", "end"])
    assert set(inc["kind"]) == KINDS
    assert (inc["start"] >= pd.Timestamp(info["test_start"])).all()
    assert info["rows"] == 5 * 1440 - 43 + 2
    with pytest.raises(ValueError, match="at least 4 days"):
        ps.generate(tmp_path / "short", days=2)


def test_script_and_plot(tmp_path):
    assert ps.main(["--out", str(tmp_path), "--plot"]) == 0
    png = tmp_path / "station.png"
    # reference: PNG file signature (PNG specification, section 5.2)
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    import matplotlib.image

    img = matplotlib.image.imread(png)
    assert img.shape[0] > 600 and img.shape[1] > 1200
