"""Held readings (runtime/held.py): run lengths against the standard library, the limit against
the geometric run model it rests on and against simulated readings, which channels compile
watches, what the Judge does with a frozen reading (alert, channel, close, gap), that a detector
resumes its runs exactly and refuses a tampered state or section, and that on SKAB's real
readings (labelled normal) the check stays silent."""

import itertools
import json
import math

import numpy as np
import pandas as pd
import pytest
import runtime_fixtures as fx
import skab_protocol

from ganlet.runtime.alerts import BY_HELD, BY_SCORE
from ganlet.runtime.detector import Detector, Judge
from ganlet.runtime.held import ALPHA, HeldReadings, calibrate_held, channel_limit, run_lengths
from ganlet.runtime.manifest import BundleError, load_bundle
from ganlet.runtime.scorer import make_scorer

ALERTING = {"warmup_hops": 0, "min_hops": 3, "close_ratio": 0.95, "cooldown_hops": 8}


def test_run_lengths_match_itertools_groupby_and_a_missing_reading_ends_a_run():
    rng = np.random.default_rng(0)
    x = np.round(rng.standard_normal(5000), 1)  # coarse: many repeats
    x[rng.choice(5000, 40, replace=False)] = np.nan
    # reference: Python's itertools.groupby over the stretches between missing readings
    expected = [len(list(g)) for is_nan, stretch in itertools.groupby(x, key=math.isnan)
                if not is_nan for _, g in itertools.groupby(stretch)]
    assert run_lengths(x).tolist() == expected


def test_the_limit_is_the_smallest_run_the_geometric_model_puts_below_the_risk():
    rng = np.random.default_rng(1)
    x = np.round(rng.standard_normal(20000) * 20)  # a live sensor at a coarse resolution
    found = channel_limit(x, 1e-6)
    p, limit = found["repeat"], found["limit"]
    repeats = int(np.sum(x[1:] == x[:-1]))
    assert p == pytest.approx((repeats + 1) / (len(x) - 1 + 2))
    assert (1 - p) * p ** limit <= 1e-6 < (1 - p) * p ** (limit - 1)
    assert found["longest"] <= limit and found["chance"] >= ALPHA


@pytest.mark.parametrize("seed", [3, 7])
def test_fresh_readings_pass_the_limit_about_as_often_as_the_risk(seed):
    """2,000,000 fresh readings of a live sensor, the limit fitted on 20,000 of its readings for
    a risk of 1e-5 per row. Readings spread evenly over their values (every value repeats with
    the same chance): the geometric model is exact and the rate stays within the risk. A
    quantised Gaussian noise (the mode repeats more): within the factor held.py derives,
    2^(L/2) / sqrt(L + 1)."""
    risk = 1e-5
    cases = (("even", lambda rng, n: np.floor(rng.uniform(0, 20, n)), lambda L: 1.0),
             ("gaussian", lambda rng, n: np.round(rng.standard_normal(n) * 2),
              lambda L: 2 ** (L / 2) / math.sqrt(L + 1)))
    for name, draw, factor in cases:
        rng = np.random.default_rng(seed)
        limit = channel_limit(draw(rng, 20000), risk)["limit"]
        assert limit is not None  # precondition: these histories fit the run model
        fresh = run_lengths(draw(rng, 2_000_000))
        rate = np.sum(fresh > limit) / fresh.sum()
        print(f"{name} seed {seed}: limit {limit}, runs past it per row {rate:.2e} "
              f"(risk {risk:g}, bound {factor(limit) * risk:.2e})")
        assert rate <= factor(limit) * risk


def test_a_history_whose_longest_run_the_model_calls_improbable_is_not_watched():
    rng = np.random.default_rng(7)
    x = np.round(rng.standard_normal(20000) * 2)
    x[5000:5012] = x[5000]  # twelve identical readings: chance about 1e-5 under the model
    found = channel_limit(x, 1e-5)
    assert found["limit"] is None and found["chance"] < ALPHA and found["longest"] == 12


def test_a_channel_that_holds_for_reasons_of_its_own_is_not_watched():
    rng = np.random.default_rng(4)
    live = 5.0 + 0.02 * rng.standard_normal(6000)
    running = (np.arange(6000) // 300) % 2 == 0
    current = np.where(running, np.round(40 + rng.standard_normal(6000), 2), 0.0)  # 0 stopped
    logged_fast = np.repeat(np.round(rng.standard_normal(600), 3), 10)  # updates every 10 rows
    found = calibrate_held(np.column_stack([live, current, logged_fast]), 1e-4)
    limits = found["section"]["limits"]
    assert limits[0] is not None and limits[0] <= 4       # no repeat in 6,000 readings
    assert limits[1] is None                              # 300 zeros in a row while stopped
    assert found["channels"][1]["chance"] < ALPHA
    # logged ten times per update: runs of ten are what the model expects, the limit is longer
    assert limits[2] is not None and limits[2] > 10
    assert calibrate_held(np.zeros((100, 2)), 1e-4)["section"] is None


def _judge(limits, level=10.0) -> Judge:
    return Judge("b", ["a", "b"], ["u", "u"],
                 {"kind": "static", "level": level, "held": {"limits": limits}}, ALERTING)


def test_a_frozen_reading_opens_an_alert_naming_it_and_closes_when_it_moves():
    judge = _judge([None, 4])
    rng = np.random.default_rng(5)
    events = []
    for k in range(200):
        frozen = 40 <= k < 120
        judge.see([0.0, 7.25 if frozen else float(rng.standard_normal())])
        events += [dict(e, k=k) for e in judge.step(float(k), 1.0)
                   if e["event"] in ("alert_opened", "alert_closed")]
    opened, closed = events
    # the run passes 4 at the fifth identical reading (k = 44); three hops on, the alert opens,
    # dated from its first hop
    assert opened["opened_by"] == BY_HELD and opened["k"] == 46
    assert opened["opened"] == "1970-01-01T00:00:44Z"
    # the reading moved at k = 120: closed on the third hop without a held run (the off-delay
    # of an alert whose evidence is there or not, as long as its on-delay: detector.py)
    assert closed["k"] == 122
    # a negative level (a baseline's score in `ganlet evaluate`, e.g. OneClassSVM's negated
    # score_samples) changes nothing: short runs stay below the level, a long one passes it
    judge = _judge([None, 4], level=-10.0)
    runs = []
    for k in range(60):
        judge.see([0.0, 7.25 if k >= 40 else float(rng.standard_normal())])
        runs += [e["k"] for e in (dict(e, k=k) for e in judge.step(float(k), -20.0))
                 if e["event"] == "alert_opened"]
    assert runs == [46]
    # a gap restarts the runs: a reading held across it counts from the gap
    judge = _judge([None, 4])
    for _ in range(4):
        judge.see([0.0, 7.25])
    judge.reset_run()
    for _ in range(4):
        judge.see([0.0, 7.25])
    assert judge.held.ratio() == 1.0


def test_a_reading_frozen_while_another_alert_is_open_is_said_at_once_once_per_run():
    # the score holds an alert open from hop 10 to hop 150; channel b freezes at hops 40-79 and
    # again at 90-119: each run is said when it passes its limit, naming the open alert, not
    # hidden until that alert has closed and cooled down (stop 36)
    judge = _judge([None, 4])
    rng = np.random.default_rng(7)
    held, opened = [], []
    for k in range(200):
        frozen = 40 <= k < 80 or 90 <= k < 120
        judge.see([0.0, 7.25 if frozen else float(rng.standard_normal())])
        for e in judge.step(float(k), 20.0 if 10 <= k < 150 else 1.0):
            if e["event"] == "reading_held":
                held.append(dict(e, k=k))
            elif e["event"] == "alert_opened":
                opened.append(e)
    assert [o["opened_by"] for o in opened] == [BY_SCORE]
    assert [h["k"] for h in held] == [44, 94]  # the fifth identical reading, once per run
    assert all(h["channel"] == "b" and h["limit"] == 4 and h["readings"] == 5
               and h["alert_id"] == opened[0]["alert_id"] for h in held)
    # with no alert open the frozen reading opens its own, which names it: nothing more is said
    judge = _judge([None, 4])
    events = []
    for k in range(100):
        judge.see([0.0, 7.25 if 40 <= k < 80 else float(rng.standard_normal())])
        events += [e["event"] for e in judge.step(float(k), 1.0)]
    assert "reading_held" not in events and events.count("alert_opened") == 1


def test_what_was_said_of_a_held_run_survives_a_restart():
    judge = _judge([None, 4])
    for _ in range(6):
        judge.see([0.0, 7.25])
    assert judge.held.newly_past() == [1] and judge.held.newly_past() == []
    again = _judge([None, 4])
    again.held.restore(json.loads(json.dumps(judge.held.state())))
    assert again.held.newly_past() == [] and again.held.told == [False, True]
    older = {k: v for k, v in judge.held.state().items() if k != "told"}
    again.held.restore(older)  # a state from before `told`: a run past its limit was said
    assert again.held.told == [False, True] and again.held.newly_past() == []
    again.see([0.0, 7.5])  # a new reading starts a new run, not yet past
    assert again.held.told == [False, False]


def test_a_detector_names_the_held_channel_and_resumes_its_runs_exactly(tmp_path):
    values = fx.raw_values(400, seed=6)
    values[200:260, 2] = values[200, 2]  # the third channel freezes
    bundle = load_bundle(fx.build_bundle(tmp_path / "b", onnx_model=False, alerting=ALERTING,
                                         threshold={"kind": "static", "level": 1e9,
                                                    "held": {"limits": [5, None, 5]}}))

    def detector():
        return Detector(bundle, make_scorer(bundle, "numpy"))

    def feed(det, rows):
        return [e for k in rows for e in det.feed(float(fx.T0 + k), values[k])]

    whole = feed(detector(), range(len(values)))
    opened = [e for e in whole if e["event"] == "alert_opened"]
    assert len(opened) == 1 and opened[0]["opened_by"] == BY_HELD
    assert opened[0]["moved"]["name"] == bundle.channels[2]
    assert opened[0]["moved"]["held_readings"] >= 6
    first = detector()
    head = feed(first, range(230))  # stop inside the alert
    assert first.judge.is_open
    second = detector()
    second.restore(json.loads(json.dumps(first.state())))
    assert head + feed(second, range(230, len(values))) == whole
    for bad in ({"runs": [1, 0], "last": [1.0, None]},           # one channel short
                {"runs": [1, 0, -1], "last": [1.0, None, None]},
                {"runs": [1, 0, 2], "last": [1.0, None, None]},  # a run without a reading
                {"runs": [1, 0, 2], "last": [1.0, None, "2"]},
                {"runs": [1.5, 0, 2], "last": [1.0, None, 2.0]},
                [[1, 0, 2], [1.0, None, 2.0]]):
        broken = json.loads(json.dumps(first.state()))
        broken["judge"]["held"] = bad
        with pytest.raises(ValueError, match="held"):
            detector().restore(broken)
    older = json.loads(json.dumps(first.state()))
    del older["judge"]["held"]  # a state from before the check: runs start again
    later = detector()
    later.restore(older)
    assert later.judge.held.runs == [0, 0, 0]


@pytest.mark.parametrize("section", [{"limits": [5, None]}, {"limits": [5, 0, None]},
                                     {"limits": [5, 2.5, None]}, {"limits": [5, True, None]},
                                     {"limits": "5"}, {"limits": [5, None, None], "risk": 1},
                                     [5, None, None]])
def test_a_malformed_held_section_is_refused_when_the_bundle_loads(tmp_path, section):
    with pytest.raises(ValueError, match="held"):
        HeldReadings.from_policy({"kind": "static", "level": 1.0, "held": section}, 3)
    with pytest.raises(BundleError, match="manifest: threshold: .*held"):
        load_bundle(fx.build_bundle(tmp_path / "b", onnx_model=False, threshold={
            "kind": "static", "level": 1.0, "held": section}), skip_signature=True)


def _skab_files():
    files = skab_protocol.skab_files()
    free = sorted((skab_protocol.SKAB / "anomaly-free").glob("*.csv"))
    if not files or not free:
        pytest.skip(f"SKAB data not found under {skab_protocol.SKAB} (test data beside the "
                    "repository, not part of it)")
    return files, free


def test_on_skab_readings_labelled_normal_the_check_stays_silent():
    """SKAB (../shared/data/skab): real sensors at one reading a second. Fitted on each valve1
    file's first 400 rows (the benchmark's training span) and on the anomaly-free file's first
    400 and 4,000, for the default budget (1 alarm a week), no run passes its limit in any row
    labelled normal; the check watches most channels (it is not silent by being off)."""
    files, free = _skab_files()
    risk_per_row = 1.0 / (7 * 86400)  # 1 alarm a week at one reading a second
    watched, channels, false_rows = 0, 0, 0
    spans = [(pd.read_csv(f, sep=";"), 400) for f in files]
    spans += [(pd.read_csv(free[0], sep=";"), n) for n in (400, 4000)]
    for frame, train in spans:
        labels = frame["anomaly"].to_numpy() > 0 if "anomaly" in frame else np.zeros(len(frame))
        values = frame.drop(columns=[c for c in ("datetime", "anomaly", "changepoint")
                                     if c in frame]).to_numpy(np.float64)
        limits = calibrate_held(values[:train], risk_per_row)["channels"]
        channels += len(limits)
        for c, found in enumerate(limits):
            if found["limit"] is None:
                continue
            watched += 1
            judge = HeldReadings([found["limit"]])
            for k in range(train, len(values)):
                judge.add(values[k, c:c + 1])
                false_rows += judge.ratio() > 1.0 and not labels[k]
    print(f"SKAB: {watched} of {channels} channel fits watched, {false_rows} false rows")
    assert false_rows == 0
    assert watched >= 0.8 * channels
