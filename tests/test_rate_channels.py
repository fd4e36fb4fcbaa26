"""Channels watched by their rate (change per period) instead of their level: the feature
definition, the gateway's streaming path (start, short and long gaps, checkpoints), the
manifest, `ganlet train --rate`, and the workstation/gateway parity of a trained rate model."""

import contextlib
import io
import json

import numpy as np
import pandas as pd
import pytest
import runtime_fixtures as fx
import torch
from synthetic import correlated_series
from typer.testing import CliRunner

from ganlet.compile.cli import app
from ganlet.compile.data import RobustScaler, load_frame, split_spans
from ganlet.compile.distil import DistilConfig
from ganlet.compile.model import TeacherConfig
from ganlet.compile.pipeline import CompileOptions, compile_model
from ganlet.compile.train import load_model, save_model, train
from ganlet.compile.verify import verify
from ganlet.runtime import features
from ganlet.runtime.cli import main
from ganlet.runtime.manifest import BundleError, load_bundle

WINDOW, HOP = 16, 4
FEATURES = ["level", "rate", "level"]          # the fixture's pressure channel by rate
RATE = features.rate_mask(FEATURES)
CENTER = [fx.CENTER[0], 0.0, fx.CENTER[2]]     # a rate's centre sits near zero


def gateway_scaled(values: np.ndarray) -> np.ndarray:
    f = features.series(values, RATE)
    return ((f - np.asarray(CENTER, np.float32)) / np.asarray(fx.SCALE, np.float32)
            ).astype(np.float32)


@pytest.fixture(scope="module")
def rate_bundle(tmp_path_factory):
    return fx.build_bundle(tmp_path_factory.mktemp("rate") / "bundle", window=WINDOW, hop=HOP,
                           features=FEATURES, center=CENTER, onnx_model=False)


def stream(bundle_dir, csv_path, scores, *extra):
    out, err = io.StringIO(), io.StringIO()
    argv = ["stream", "--input", str(csv_path), "--scores-out", str(scores), "--heartbeat", "0",
            "--backend", "numpy", *extra]
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main(argv, bundle_dir=bundle_dir)
    assert code == 0, err.getvalue()
    # reference: pandas.read_csv reads the scores file past its `#` provenance lines
    return ([json.loads(line) for line in out.getvalue().splitlines()],
            pd.read_csv(scores, comment="#"))


def test_rate_is_the_first_difference():
    values = fx.raw_values(50, seed=3)
    got = features.series(values, RATE)
    # reference: pandas.DataFrame.diff (first row NaN) for the rate column, untouched levels
    ref = pd.DataFrame(values).diff().to_numpy()
    np.testing.assert_array_equal(got[:, 1], ref[:, 1])
    np.testing.assert_array_equal(got[:, [0, 2]], values[:, [0, 2]])
    row = features.row(values[7], values[6], RATE)
    np.testing.assert_array_equal(row, got[7])
    assert np.isnan(features.row(values[7], None, RATE)[1])


def test_stream_start_and_gaps_match_the_workstation_features(rate_bundle, tmp_path):
    n = 200
    values = fx.raw_values(n, seed=4)
    times = fx.T0 + np.arange(n, dtype=float)
    keep = np.ones(n, bool)
    keep[50:52] = False     # 2 missing periods <= max_gap_periods (3): filled in
    keep[120:130] = False   # 10 missing periods: window reset
    fx.write_csv(tmp_path / "gaps.csv", values[keep], times=times[keep])
    events, df = stream(rate_bundle, tmp_path / "gaps.csv", tmp_path / "s.csv")

    # the workstation's way: short gaps filled linearly in raw units, then the features
    # reference: pandas.Series.interpolate (linear) over the missing rows
    filled = pd.DataFrame(np.where(keep[:, None], values, np.nan)).interpolate(
        limit_area="inside").to_numpy()
    first = fx.direct_scores(rate_bundle, gateway_scaled(filled[:120])[1:], WINDOW, HOP)
    second = fx.direct_scores(rate_bundle, gateway_scaled(filled[130:])[1:], WINDOW, HOP)
    np.testing.assert_allclose(df.score.to_numpy(), np.concatenate([first, second]), rtol=1e-5)
    # a rate needs the row before: the first window ends one sample later than for levels
    t = pd.to_datetime(df.time, utc=True)
    assert t[0] == pd.Timestamp(times[WINDOW], unit="s", tz="UTC")
    assert t[len(first)] == pd.Timestamp(times[130 + WINDOW], unit="s", tz="UTC")
    gap = [e for e in events if e["event"] == "gap"]
    assert len(gap) == 1 and gap[0]["samples_to_refill"] == WINDOW + 1


def test_resume_from_checkpoint_equals_one_run(rate_bundle, tmp_path):
    values = fx.raw_values(300, seed=5)
    lines = fx.write_csv(tmp_path / "all.csv", values)
    (tmp_path / "part.csv").write_text("\n".join(lines[:138]) + "\n")  # stops mid-hop
    state = tmp_path / "state.json"
    stream(rate_bundle, tmp_path / "part.csv", tmp_path / "run.csv", "--state", str(state))
    assert json.loads(state.read_text())["state"]["detector"]["last_raw"] is not None
    events, _ = stream(rate_bundle, tmp_path / "all.csv", tmp_path / "run.csv",
                       "--state", str(state))
    assert events[0]["resumed"] is True
    stream(rate_bundle, tmp_path / "all.csv", tmp_path / "one.csv")
    assert rows(tmp_path / "run.csv") == rows(tmp_path / "one.csv")


def rows(scores) -> bytes:
    """A scores file's CSV part, without the `#` provenance lines (their start time differs)."""
    return b"".join(ln for ln in scores.read_bytes().splitlines(keepends=True)
                    if not ln.startswith(b"#"))


def test_manifest_features(rate_bundle, tmp_path):
    assert load_bundle(rate_bundle).features == FEATURES
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        assert main(["check"], bundle_dir=rate_bundle) == 0
    assert "pressure [bar] by rate" in out.getvalue() and "flow [m3/h]," in out.getvalue()
    old = fx.build_bundle(tmp_path / "old", onnx_model=False)      # no scaler.features key
    assert load_bundle(old).features == ["level"] * 3
    with pytest.raises(BundleError, match="scaler.features"):
        fx.build_bundle(tmp_path / "bad", onnx_model=False, features=["level", "slope", "level"])


# ---------------------------------------------------------------------------------------------
# the workstation side


TINY = TeacherConfig(window=12, adversarial_epochs=2, inversion_epochs=8, encoder_hidden=(8,),
                      generator_hidden=(6, 8), latent=2, max_train_windows=400)


def drifting(n=900, seed=3):
    """The synthetic series with a slow warm-up ramp on one channel."""
    df = correlated_series(n, seed=seed)
    col = [c for c in df.columns if c != "time"][0]
    df[col] = df[col] + np.linspace(0.0, 6.0 * df[col].std(), n)
    return df, col


def test_train_rate_scaler_and_parity(tmp_path):
    torch.set_num_threads(1)
    df, col = drifting()
    data = tmp_path / "data.csv"
    df.to_csv(data, index=False)
    frame = load_frame(data)
    model = train(frame, split_spans(frame, 500, 0.25), TINY, rate_channels=[col])
    j = frame.channels.index(col)
    assert model.scaler.features[j] == "rate"
    # the scaler of a rate channel is the robust scale of its differences
    # reference: numpy.nanmedian / nanpercentile of pandas.Series.diff over the fit span
    d = pd.Series(frame.values[:model.spans.fit[1], j]).diff()
    assert model.scaler.center[j] == pytest.approx(np.nanmedian(d))
    q75, q25 = np.nanpercentile(d, [75, 25])
    assert model.scaler.scale[j] == pytest.approx((q75 - q25) / 1.349)
    model_dir = save_model(model, tmp_path / "model")
    assert load_model(model_dir).scaler.features == model.scaler.features
    compile_model(model, tmp_path / "bundle",
                  CompileOptions(board="workstation", threshold="rolling",
                                 distil=DistilConfig(epochs=3, max_real_windows=300)),
                  model_dir=model_dir)
    assert load_bundle(tmp_path / "bundle").features[j] == "rate"
    assert f"{col} (rate)" in (tmp_path / "bundle" / "INSTALL.txt").read_text()
    result = verify(tmp_path / "bundle", data, model_dir=model_dir)
    assert result.passed, result.summary()
    assert result.hops == 900 - TINY.window      # one fewer than levels: the rate's first row


def test_cli_rate_unknown_channel_and_trend_note(tmp_path, write_csv):
    df, col = drifting(400)
    path = write_csv(df)
    r = CliRunner().invoke(app, ["train", str(path), "--out", str(tmp_path / "m"),
                                 "--rate", "nosuch", "--quiet"])
    assert r.exit_code == 2 and "--rate nosuch: no such channel" in r.output
    r = CliRunner().invoke(app, ["train", str(path), "--out", str(tmp_path / "m"),
                                 "--adversarial-epochs", "1", "--inversion-epochs", "1",
                                 "--window", "8"])
    assert r.exit_code == 0, r.output
    assert f"channel {col!r} trends over the fit span" in r.output and f"--rate {col}" in r.output


def test_baselines_see_levels_whatever_the_detector_watches(tmp_path):
    from ganlet.compile.evaluate import evaluate

    torch.set_num_threads(1)
    df, col = drifting(700)
    data = tmp_path / "data.csv"
    df.to_csv(data, index=False)
    frame = load_frame(data)
    spans = split_spans(frame, 400, 0.25)
    incidents = pd.DataFrame({"start": [df.time.iloc[500]], "end": [df.time.iloc[540]],
                              "kind": ["x"]})
    scores = {}
    for name, rate in (("level", []), ("rate", [col])):
        d = save_model(train(frame, spans, TINY, rate_channels=rate), tmp_path / name)
        r = evaluate(d, data, incidents, eval_from=400, threshold="static", teacher=False)
        scores[name] = r.methods["IsolationForest"].scores
        assert (f"watches {col} by rate" in r.summary()) == bool(rate)
    np.testing.assert_array_equal(scores["level"], scores["rate"])
    # and they are the levels, robust-scaled on the fit span
    levels = RobustScaler.fit(frame.values[:spans.fit[1]], frame.channels)
    assert levels.features == ["level"] * len(frame.channels)
