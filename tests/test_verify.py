"""`ganlet verify`: parity of the gateway path against onnxruntime, numpy, fp32 student and
teacher on a tiny trained model; a tampered device capture fails; bad input exits 2."""

import hashlib
import json
import platform
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import torch
import typer
from synthetic import correlated_series, inject
from typer.testing import CliRunner

from ganlet.compile.cli_reports import register
from ganlet.compile.data import load_frame, split_spans
from ganlet.compile.distil import DistilConfig
from ganlet.compile.gateway import run_bundle
from ganlet.compile.model import TeacherConfig
from ganlet.compile.pipeline import CompileOptions, compile_model
from ganlet.compile.train import save_model, train
from ganlet.compile.verify import verify

TINY = TeacherConfig(window=12, adversarial_epochs=2, inversion_epochs=8, encoder_hidden=(8,),
                      generator_hidden=(6, 8), latent=2, max_train_windows=400)


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    torch.set_num_threads(1)
    root = tmp_path_factory.mktemp("verify")
    df, _ = inject(correlated_series(900, seed=3), start=500, seed=2)
    data = root / "data.csv"
    df.to_csv(data, index=False)
    frame = load_frame(data)
    model = train(frame, split_spans(frame, 500, 0.25), TINY)
    model_dir = save_model(model, root / "model")
    compile_model(model, root / "bundle",
                  CompileOptions(board="workstation", threshold="rolling",
                                 distil=DistilConfig(epochs=3, max_real_windows=300)),
                  model_dir=model_dir)
    return {"root": root, "data": data, "bundle": root / "bundle", "model": model_dir}


def cli():
    app = typer.Typer()
    register(app)

    @app.command("noop")
    def noop():  # a second command keeps typer from collapsing the app into one command
        pass

    return app


def test_parity_passes_and_reports(built, tmp_path):
    result = verify(built["bundle"], built["data"], model_dir=built["model"])
    assert set(result.pairs) == {"onnxruntime", "numpy", "fp32 student", "teacher"}
    assert result.passed, result.summary()
    assert result.pairs["onnxruntime"]["strict"] and not result.pairs["teacher"]["strict"]
    assert set(result.pairs["teacher"]["checks"]) == {"spearman"}
    # the device's own scores through the gateway's judge, with the context of the rows, give
    # its alert column again, the frozen temperature's alert included; a score series alone
    # does not (held readings are judged on the readings): replayed without them, the alert
    # column differs from the freeze on
    from ganlet.compile.verify import replay_alerts
    from ganlet.runtime.manifest import load_bundle

    policy = load_bundle(built["bundle"]).threshold_policy
    assert policy["held"]["limits"][2] is not None  # precondition: temp is watched
    device = result.series["device"]
    assert result.device_replay_agreement == 1.0
    assert not any("replaying the device's own scores" in n for n in result.notes)
    _, scores_only = replay_alerts(device["score"], policy, load_bundle(built["bundle"]).alerting)
    differ = result.times[scores_only != device["alert"]]
    frozen_from = pd.Timestamp("2026-01-05") + pd.Timedelta(minutes=766)  # synthetic.inject
    assert len(differ) > 0 and (differ >= frozen_from).all()
    # the device's hops: one per sample once the window is full (hop 1 on this board)
    assert result.hops == 900 - TINY.window + 1

    # reference: onnx.reference.ReferenceEvaluator (the ONNX spec in numpy) on the same windows
    from onnx.reference import ReferenceEvaluator

    from ganlet.runtime.manifest import load_bundle
    b = load_bundle(built["bundle"])
    frame = load_frame(built["data"])
    series = ((frame.values - b.center) / b.scale).astype(np.float32)
    windows = np.stack([series[r - b.window + 1:r + 1] for r in range(TINY.window - 1, 900)])
    (recon,) = ReferenceEvaluator(str(b.onnx_path)).run(["reconstruction"], {"window": windows})
    # hops whose window lies inside the drift envelope: nothing re-centred, the raw window
    # is what the network saw
    means = windows.astype(np.float64).mean(axis=1)
    inside = ((means >= b.manifest["drift"]["lo"]) & (means <= b.manifest["drift"]["hi"])).all(1)
    assert inside.mean() > 0.5
    np.testing.assert_allclose(result.series["onnxruntime"]["score"][inside],
                               written_out_score(b.manifest["score"], windows, recon)[inside],
                               rtol=1e-4)
    # reference: torch forward of the teacher (torch.nn.LSTM) on the same windows
    from ganlet.compile.train import load_model
    m = load_model(built["model"])
    with torch.no_grad():
        teacher_recon = m.teacher.reconstruct(torch.from_numpy(windows)).numpy()
    np.testing.assert_allclose(result.series["teacher"]["score"][inside],
                               written_out_score(b.manifest["score"], windows,
                                                 teacher_recon)[inside], rtol=1e-5)


def written_out_score(section: dict, windows: np.ndarray, recon: np.ndarray) -> np.ndarray:
    """The score definition of runtime/score.py, written out here in float64 numpy: over the
    newest k = `steps` steps, the mean squared error (+ k times the mean error squared under
    statistic "mse+offset"), its root in units of the nearest regime's scale, root mean square
    over channels."""
    steps = section["steps"]
    err = windows[:, -steps:].astype(np.float64) - recon[:, -steps:]
    res = (err ** 2).mean(axis=1)
    if section.get("statistic") == "mse+offset":
        res = res + steps * err.mean(axis=1) ** 2
    centres = np.asarray(section["regimes"]["centres"])
    scale = np.asarray(section["regimes"]["scale"])
    means = windows.astype(np.float64).mean(axis=1)
    regime = ((means[:, None, :] - centres[None]) ** 2).sum(axis=2).argmin(axis=1)
    z = np.sqrt(res) / scale[regime]
    return np.sqrt((z ** 2).mean(axis=1))


def test_cli_pass_json_html(built, tmp_path):
    out_json, out_html = tmp_path / "p.json", tmp_path / "p.html"
    r = CliRunner().invoke(cli(), ["verify", str(built["bundle"]), str(built["data"]),
                                   "--model", str(built["model"]),
                                   "--json", str(out_json), "--html", str(out_html)])
    assert r.exit_code == 0, r.output
    summary = json.loads(out_json.read_text())
    assert summary["passed"] is True
    assert summary["pairs"]["numpy"]["max_rel_error"] <= summary["tolerances"]["score_rel"]
    page = out_html.read_text()
    assert page.count("data:image/png;base64,") == 3 and "rank only" in page


def drifted_capture(scores: Path, out: Path) -> Path:
    """The capture with a device that drifted by 1 % for a few hops; its provenance lines kept."""
    head = [ln for ln in scores.read_text().splitlines(keepends=True) if ln.startswith("#")]
    # reference: pandas.read_csv(comment="#") reads the scores file past its provenance lines
    df = pd.read_csv(scores, comment="#")
    k = len(df) // 2
    df.loc[k:k + 5, "score"] *= 1.01
    out.write_text("".join(head) + df.to_csv(index=False))
    return out


def test_an_alert_column_its_own_scores_do_not_give_is_noted(built, tmp_path):
    scores = run_bundle(built["bundle"], built["data"], tmp_path / "dev").scores
    head = [ln for ln in scores.read_text().splitlines(keepends=True) if ln.startswith("#")]
    df = pd.read_csv(scores, comment="#")
    quiet = np.flatnonzero(df["alert"].to_numpy() == 0)[:9]
    df.loc[quiet, "alert"] = 1                         # a device that alerts on its own
    flipped = tmp_path / "flipped.csv"
    flipped.write_text("".join(head) + df.to_csv(index=False))
    result = verify(built["bundle"], built["data"], device_scores=flipped)
    assert result.device_replay_agreement == pytest.approx(1 - 9 / result.hops)
    assert any("reproduces its alert column on" in n for n in result.notes)


def test_tampered_device_capture_fails(built, tmp_path):
    scores = run_bundle(built["bundle"], built["data"], tmp_path / "dev").scores
    bad = drifted_capture(scores, tmp_path / "bad.csv")
    r = CliRunner().invoke(cli(), ["verify", str(built["bundle"]), str(built["data"]),
                                   "--device-scores", str(bad), "--json",
                                   str(tmp_path / "bad.json"), "--html", str(tmp_path / "bad.html")])
    assert r.exit_code == 1, r.output
    summary = json.loads((tmp_path / "bad.json").read_text())
    pair = summary["pairs"]["onnxruntime"]
    assert pair["checks"]["score_rel"] is False
    assert pair["max_rel_error"] == pytest.approx(0.01 / 1.01, rel=1e-3)  # relative to the device
    # the FAIL row names the tolerance and by how much it was missed
    failed = {f["tolerance"]: f for f in pair["failed"]}
    assert failed["score_rel"]["limit"] == summary["tolerances"]["score_rel"]
    assert failed["score_rel"]["by"] == pytest.approx(0.01 / 1.01 - 1e-4, rel=1e-3)
    assert "FAIL device vs onnxruntime: score_rel: max relative error 0.0099" in r.output
    page = (tmp_path / "bad.html").read_text()
    assert '<tr class="fail">' in page and "score_rel: max relative error 0.0099 exceeds" in page
    assert all(p["failed"] == [] for p in summary["pairs"].values() if p["passed"])
    # a loose tolerance accepts the same capture
    r = CliRunner().invoke(cli(), ["verify", str(built["bundle"]), str(built["data"]),
                                   "--device-scores", str(tmp_path / "bad.csv"),
                                   "--tolerance", "score_rel=0.02"])
    assert r.exit_code == 0, r.output


def test_repeated_and_swapped_rows_are_refused_alike_and_parity_holds(built, tmp_path):
    raw = pd.read_csv(built["data"])
    rows = pd.concat([raw.iloc[:300], raw.iloc[[299]], raw.iloc[300:]])   # a repeated row
    order = list(range(len(rows)))
    order[600], order[601] = order[601], order[600]                       # two rows swapped
    rows.iloc[order].to_csv(tmp_path / "messy.csv", index=False)
    result = verify(built["bundle"], tmp_path / "messy.csv")
    # every series is the gateway's own detector on the same rows: the repeated and the
    # out-of-order rows are refused for all of them, and the note says so
    assert any("duplicate_time 1" in n and "out_of_order 1" in n for n in result.notes)
    assert result.pairs["numpy"]["checks"]["score_rel"], result.summary()
    assert result.passed, result.summary()


def test_unusable_input_exits_2(built, tmp_path):
    (tmp_path / "junk.csv").write_text("a,b\n1,2\n")
    r = CliRunner().invoke(cli(), ["verify", str(built["bundle"]), str(tmp_path / "junk.csv")])
    assert r.exit_code == 2 and "error:" in r.output
    r = CliRunner().invoke(cli(), ["verify", str(tmp_path), str(built["data"])])
    assert r.exit_code == 2 and "error:" in r.output
    r = CliRunner().invoke(cli(), ["verify", str(built["bundle"]), str(built["data"]),
                                   "--tolerance", "nonsense=1"])
    assert r.exit_code == 2 and "unknown" in r.output


def test_reports_say_what_they_tested(built, tmp_path, monkeypatch):
    from datetime import datetime, timezone

    from ganlet.compile import report
    from ganlet.runtime.manifest import load_bundle

    labels = []
    real_png = report.figure_png

    def recording_png(fig):   # every axis of every figure, as the page will show it
        labels.append([(ax.get_xlabel(), ax.get_ylabel()) for ax in fig.axes])
        return real_png(fig)

    monkeypatch.setattr(report, "figure_png", recording_png)
    out_json, out_html = tmp_path / "p.json", tmp_path / "p.html"
    r = CliRunner().invoke(cli(), ["verify", str(built["bundle"]), str(built["data"]),
                                   "--json", str(out_json), "--html", str(out_html)])
    assert r.exit_code == 0, r.output
    said = json.loads(out_json.read_text())["provenance"]
    bundle = load_bundle(built["bundle"])
    # reference: hashlib.sha256 over the files' bytes
    manifest_sha = hashlib.sha256((built["bundle"] / "manifest.json").read_bytes()).hexdigest()
    assert said["bundle"]["bundle_id"] == bundle.bundle_id == manifest_sha
    assert said["bundle"]["manifest_sha256"] == manifest_sha
    assert said["data"]["sha256"] == hashlib.sha256(built["data"].read_bytes()).hexdigest()
    # reference: pandas reads the data's time column; its first and last time are the span
    times = pd.to_datetime(pd.read_csv(built["data"])["time"], utc=True)
    assert said["data"]["first"] == times.min().strftime("%Y-%m-%dT%H:%M:%SZ")
    assert said["data"]["last"] == times.max().strftime("%Y-%m-%dT%H:%M:%SZ")
    # the gateway run here used this interpreter: its scores file says so
    assert said["device"]["python"] == platform.python_version()
    assert said["device"]["numpy"] == np.__version__
    assert said["device"]["machine"] == platform.machine()
    assert said["device"]["bundle_id"] == bundle.bundle_id
    written = datetime.fromisoformat(said["report"]["created"].replace("Z", "+00:00"))
    assert abs((datetime.now(timezone.utc) - written).total_seconds()) < 600
    page = out_html.read_text()
    assert bundle.bundle_id in page and said["data"]["sha256"] in page
    assert "Tolerances applied" in page and "event_match_hops" in page
    # every plotted axis says what it shows with its unit; a figure's x axis (shared by its
    # stacked panels) is labelled once, at the bottom; time axes say their zone
    assert len(labels) == 3, labels
    overlay, scatter, histogram = labels
    assert overlay[-1][0] == "time (UTC)"
    unit = "× normal error" if "regimes" in bundle.manifest["score"] else "scaled units²"
    assert all(y.endswith(f"score [{unit}]") for _, y in overlay), overlay
    assert all(x.startswith("device score [") and y.endswith("]") for x, y in scatter), scatter
    assert "dimensionless" in histogram[0][0] and histogram[0][1] == "hops (count)"


def test_device_scores_of_another_bundle_are_refused(built, tmp_path):
    import runtime_fixtures as fx

    other = fx.build_bundle(tmp_path / "other", onnx_model=False)
    fx.write_csv(tmp_path / "feed.csv", fx.raw_values(60))
    scores = run_bundle(other, tmp_path / "feed.csv", tmp_path / "run").scores
    r = CliRunner().invoke(cli(), ["verify", str(built["bundle"]), str(built["data"]),
                                   "--device-scores", str(scores)])
    from ganlet.runtime.manifest import load_bundle

    ours, theirs = load_bundle(built["bundle"]).bundle_id, load_bundle(other).bundle_id
    assert r.exit_code == 2, r.output
    assert f"scores are from bundle {theirs[:12]}" in r.output
    assert f"not {ours[:12]}" in r.output
