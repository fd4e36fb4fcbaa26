"""`ganlet evaluate`: metrics against incidents, baselines under one threshold rule, and the
SKAB valve1 benchmark protocol (bundle through the gateway path vs teacher vs baselines)."""

import json
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import scipy.stats
import skab_protocol
import torch
import typer
from sklearn.metrics import confusion_matrix
from synthetic import correlated_series, inject
from typer.testing import CliRunner

from ganlet.compile.cli_reports import register
from ganlet.compile.data import IntakeError, IntakeOptions, load_frame, split_spans
from ganlet.compile.distil import DistilConfig
from ganlet.compile.evaluate import BASELINES, evaluate, point_metrics, rolling_z
from ganlet.compile.model import TeacherConfig
from ganlet.compile.pipeline import CompileOptions, TrainOptions, compile_model
from ganlet.compile.train import save_model, train
from ganlet.compile.verify import verify

REPO = Path(__file__).resolve().parents[1]
SKAB = REPO / ".." / "shared" / "data" / "skab" / "valve1"
TINY = TeacherConfig(window=12, adversarial_epochs=2, inversion_epochs=8, encoder_hidden=(8,),
                      generator_hidden=(6, 8), latent=2, max_train_windows=400)
def tiny_bundle(frame, root: Path) -> Path:
    """The TINY teacher trained on the first 500 points and a workstation bundle of it in
    root/bundle (static threshold); its model directory."""
    model = train(frame, split_spans(frame, 500, 0.25), TINY)
    model_dir = save_model(model, root / "model")
    compile_model(model, root / "bundle",
                  CompileOptions(board="workstation", threshold="static",
                                 distil=DistilConfig(epochs=3, max_real_windows=300)),
                  model_dir=model_dir)
    return model_dir


@pytest.fixture(scope="module")
def synthetic(tmp_path_factory):
    torch.set_num_threads(1)
    root = tmp_path_factory.mktemp("evaluate")
    df, labels = inject(correlated_series(900, seed=4), start=500, seed=3)
    data = root / "data.csv"
    df.to_csv(data, index=False)
    times = df["time"].to_numpy()
    pad = np.concatenate([[False], labels > 0, [False]]).astype(np.int8)
    edges = np.flatnonzero(np.diff(pad))
    pd.DataFrame({"start": times[edges[0::2]], "end": times[edges[1::2] - 1],
                  "kind": "injected"}).to_csv(root / "incidents.csv", index=False)
    model_dir = tiny_bundle(load_frame(data), root)
    return {"data": data, "incidents": root / "incidents.csv", "model": model_dir,
            "bundle": root / "bundle", "labels": labels > 0}


def test_model_dir_metrics_and_baselines(synthetic):
    r = evaluate(synthetic["model"], synthetic["data"], synthetic["incidents"], eval_from=500,
                 threshold="static")
    assert list(r.methods) == ["teacher", *BASELINES]
    # labels per grid point come from the incidents file (the data has a regular grid)
    np.testing.assert_array_equal(r.labels, synthetic["labels"])
    from sklearn.metrics import precision_recall_fscore_support
    for m in r.methods.values():
        assert m.policy_kind == "static"
        # reference: sklearn.metrics.precision_recall_fscore_support on the same points
        p, rc, f1, _ = precision_recall_fscore_support(
            r.labels[r.evaluated], m.alert[r.evaluated], average="binary", zero_division=0)
        assert m.metrics["f1"] == pytest.approx(f1) and m.metrics["recall"] == pytest.approx(rc)
        # where the wrong points sit: the false-alarm kinds add up to sklearn's FP, the misses
        # to its FN (reference: sklearn.metrics.confusion_matrix)
        tn, fp, fn, tp = confusion_matrix(r.labels[r.evaluated], m.alert[r.evaluated],
                                          labels=[False, True]).ravel()
        sites = m.metrics["sites"]
        assert sites["lead"] + sites["tail"] + sites["apart"] == fp
        assert sites["onset"] + sites["unseen"] + sites["dropped"] == fn
    assert r.evaluated.sum() == 400
    assert r.methods["teacher"].metrics["event_recall"] > 0


def test_points_with_a_channel_blank_are_judged_as_the_gateway_judges_them(synthetic, tmp_path):
    # a dead transmitter: flow blank for 100 rows of the evaluated span (more than max_fill, so
    # the intake leaves them blank); the gateway scores those rows without the channel
    # (runtime/blanks.py), so they count; a baseline cannot score them and raises nothing there
    df = pd.read_csv(synthetic["data"])
    df.loc[600:699, "flow"] = np.nan
    data = tmp_path / "dead.csv"
    df.to_csv(data, index=False)
    r = evaluate(synthetic["bundle"], data, synthetic["incidents"], eval_from=500,
                 model_dir=synthetic["model"], baselines=("IsolationForest",))
    # reference: pandas, rows from 500 with at least one channel read
    read = df[["flow", "power", "temp"]].notna().any(axis=1).to_numpy()
    assert r.evaluated.sum() == read[500:].sum() == 400
    dead = np.zeros(len(df), bool)
    dead[600:700] = True
    assert np.isfinite(r.methods["bundle"].scores[dead]).all()
    assert np.isfinite(r.methods["teacher"].scores[dead]).all()
    assert np.isnan(r.methods["IsolationForest"].scores[dead]).all()
    assert not r.methods["IsolationForest"].alert[dead].any()
    assert any("100 evaluated points have a channel blank" in n for n in r.notes)


@pytest.mark.parametrize("seconds, text", [(45, "45 s"), (90, "90 s"), (600, "10 min"),
                                           (5400, "90 min"), (7200, "2 h"), (9000, "2.5 h"),
                                           (3 * 86400, "3 d"), (float("nan"), "-")])
def test_delays_read_in_seconds_minutes_hours_days(seconds, text):
    from ganlet.compile.report import duration

    assert duration(seconds) == text          # worked by hand


def test_rolling_z_matches_pandas_worked_by_hand():
    x = np.random.default_rng(0).normal(size=(100, 2)).astype(np.float32)
    s = rolling_z(x, width=10)
    k = 50
    past = x[k - 10:k].astype(np.float64)
    # reference: numpy mean/std with ddof=1 (pandas rolling std default) over the previous 10
    z = (x[k] - past.mean(axis=0)) / past.std(axis=0, ddof=1)
    assert s[k] == pytest.approx(np.mean(z ** 2), rel=1e-9)
    assert np.isnan(s[:10]).all()


def test_bundle_cli_html_json(synthetic, tmp_path):
    app = typer.Typer()
    register(app)
    r = CliRunner().invoke(app, ["evaluate", str(synthetic["bundle"]), str(synthetic["data"]),
                                 "--incidents", str(synthetic["incidents"]), "--from", "500",
                                 "--model", str(synthetic["model"]),
                                 "--html", str(tmp_path / "e.html"),
                                 "--json", str(tmp_path / "e.json")])
    assert r.exit_code == 0, r.output
    summary = json.loads((tmp_path / "e.json").read_text())
    assert set(summary["methods"]) == {"bundle (int8, gateway path)", "teacher", *BASELINES}
    assert summary["rule"]["kind"] == "static"
    page = (tmp_path / "e.html").read_text()
    assert "data:image/png;base64," in page
    # where evaluation starts: grid point 500, the data's 501st time
    # reference: pandas reads the data's time column
    first = pd.to_datetime(pd.read_csv(synthetic["data"])["time"]).iloc[500]
    assert summary["evaluation"]["first_row"] == 500 and summary["evaluation"]["before"] == 500
    assert summary["evaluation"]["first"] == f"{first:%Y-%m-%d %H:%M:%S} UTC"
    assert f"Evaluation from {first:%Y-%m-%d %H:%M:%S} UTC (grid point 500)" in r.output
    assert "the 500 points before are not counted" in page
    # abbreviations spelled out, in the terminal and on the page
    assert "FAR = false-alarm rate" in r.output and "MAR = missed-alarm rate" in r.output
    assert "false-alarm rate (FAR)" in page and "missed-alarm rate (MAR)" in page
    assert "<dt>F1</dt><dd>F1 score: the harmonic mean of precision and recall" in page
    assert set(summary["glossary"]) >= {"F1", "FAR", "MAR", "event recall", "mean delay"}
    # where the wrong points sit, per method, in the terminal, the JSON and the page
    bundle = summary["methods"]["bundle (int8, gateway path)"]
    assert sum(bundle["sites"][k] for k in ("lead", "tail", "apart")) == bundle["fp"]
    assert sum(bundle["sites"][k] for k in ("onset", "unseen", "dropped")) == bundle["fn"]
    assert set(summary["sites_meaning"]) == set(bundle["sites"])
    assert "where the wrong points sit" in r.output and "FN unseen" in r.output
    assert "<h2>Where the wrong points sit</h2>" in page and "<dt>FP apart</dt>" in page
    # alert settings as a table, each with its meaning and its length in time (1 min grid)
    alerting = summary["rule"]["alerting"]
    assert "{'warmup_hops'" not in page and "{&#x27;warmup_hops" not in page
    assert (f'<tr><td class="short">min_hops</td><td class="num short">{alerting["min_hops"]}'
            '</td>') in page
    assert summary["rule"]["step_s"]["point"] == 60.0
    # the budget and the drift action the bundle was compiled with, beside the alert machine
    manifest = json.loads((synthetic["bundle"] / "manifest.json").read_text())
    budget = manifest["false_alarms"]["budget_per_week"]
    assert re.search(rf"false-alarm budget</td><td[^>]*>{budget:g} a week</td>", page)
    assert re.search(rf"drift</td><td[^>]*>{manifest['drift']['action']}</td>", page)
    # what was tested
    said = summary["provenance"]
    from ganlet.runtime.manifest import load_bundle
    assert said["bundle"]["bundle_id"] == load_bundle(synthetic["bundle"]).bundle_id
    assert said["data"]["rows"] == 900 and said["model"]["path"] == str(synthetic["model"])
    assert said["device"]["bundle_id"] == said["bundle"]["bundle_id"]
    r = CliRunner().invoke(app, ["evaluate", str(synthetic["bundle"]), str(synthetic["data"]),
                                 "--incidents", str(tmp_path / "none.csv")])
    assert r.exit_code == 2 and "error:" in r.output



@pytest.mark.parametrize("label", ["numbers", "text"])
def test_incidents_are_read_from_the_files_own_label_column(synthetic, tmp_path, label):
    # a labelled file (a 0/1 `anomaly` column as SKAB's, a status column NORMAL / BROKEN as
    # many plant exports) is evaluated without writing an incidents file; reference: the
    # labels as pandas.read_csv reads them, and each run of them one incident
    df = pd.read_csv(synthetic["data"])
    if label == "numbers":
        column, kwargs = "anomaly", {}
        df[column] = synthetic["labels"].astype(int)
    else:
        column, kwargs = "status", {"labels": "status"}
        df[column] = np.where(synthetic["labels"], "BROKEN", "NORMAL")
    data = tmp_path / "labelled.csv"
    df.to_csv(data, index=False)
    cells = pd.read_csv(data)[column]
    flagged = (cells != 0) if label == "numbers" else (cells != "NORMAL")
    r = evaluate(synthetic["bundle"], data, None, eval_from=500, baselines=(), **kwargs)
    np.testing.assert_array_equal(r.labels, flagged.to_numpy())
    starts = int((flagged & ~flagged.shift(fill_value=False)).sum())
    assert len(r.incidents) == starts >= 1
    assert f"incidents: {starts} run(s) of labelled rows in the file's column '{column}'" in r.notes
    if label == "text":
        assert set(r.incidents["kind"]) == {"BROKEN"}
    by_file = evaluate(synthetic["bundle"], synthetic["data"], synthetic["incidents"],
                       eval_from=500, baselines=())
    assert r.methods["bundle"].metrics == by_file.methods["bundle"].metrics
    # two label columns, or one that is not there: say what to give
    app = typer.Typer()
    register(app)
    df["changepoint"] = 0
    df.to_csv(data, index=False)
    out = CliRunner().invoke(app, ["evaluate", str(synthetic["bundle"]), str(data)])
    if label == "numbers":
        assert out.exit_code == 2 and "'anomaly', 'changepoint'" in out.output
        assert "--labels COLUMN" in out.output
    out = CliRunner().invoke(app, ["evaluate", str(synthetic["bundle"]), str(data),
                                   "--labels", "nope"])
    assert out.exit_code == 2 and "--labels 'nope': no such column" in out.output
    out = CliRunner().invoke(app, ["evaluate", str(synthetic["bundle"]), str(data), "--labels",
                                   column, "--incidents", str(synthetic["incidents"])])
    assert out.exit_code == 2 and "not both" in out.output


@pytest.mark.parametrize("export", ["decimal comma, day first", "local time"])
def test_an_export_evaluates_as_it_trained(synthetic, tmp_path, export):
    # trained with --decimal , --dayfirst, the model and its bundle remember how the file was
    # written: `ganlet evaluate` read it with neither (and had no option to say them), so such a
    # file could not be evaluated at all; trained with --tz, the teacher's replay read the
    # file's times as UTC, an hour off the grid. Reference: the cells are strftime's day-first
    # dates and the points of pandas' to_csv replaced by commas, or pandas' tz_convert to
    # Europe/Berlin written without the zone; the same numbers written plainly train the same
    # network and score the same
    torch.set_num_threads(1)
    df = pd.read_csv(synthetic["data"])
    utc = pd.to_datetime(df["time"]).dt.tz_localize("UTC")
    data = tmp_path / "export.csv"
    if export == "local time":
        local = utc.dt.tz_convert("Europe/Berlin").dt.strftime("%Y-%m-%d %H:%M:%S")
        df.assign(time=local).to_csv(data, index=False)
        options = IntakeOptions(tz="Europe/Berlin")
    else:
        df.assign(time=utc.dt.strftime("%d/%m/%Y %H:%M:%S")).to_csv(
            data, sep=";", decimal=",", index=False)
        options = IntakeOptions(decimal=",", date_order="dayfirst")
    model_dir = tiny_bundle(load_frame(data, options), tmp_path)
    manifest = json.loads((tmp_path / "bundle" / "manifest.json").read_text())
    assert manifest["decimal_mark"] == options.decimal
    assert (manifest["date_order"], manifest["time_zone"]) == (options.date_order,
                                                              options.tz or "UTC")
    assert_evaluates_as_plain(synthetic, tmp_path / "bundle", data, synthetic["incidents"],
                              model_dir)


def assert_evaluates_as_plain(synthetic, bundle, data, incidents, model_dir) -> None:
    """`bundle` on `data` (model_dir its model) gives the labels, and the bundle's, teacher's
    and IsolationForest's scores, of the synthetic file written plainly."""
    r = evaluate(bundle, data, incidents, eval_from=500, model_dir=model_dir,
                 baselines=("IsolationForest",))
    plain = evaluate(synthetic["bundle"], synthetic["data"], synthetic["incidents"],
                     eval_from=500, model_dir=synthetic["model"], baselines=("IsolationForest",))
    np.testing.assert_array_equal(r.labels, plain.labels)
    for name in ("bundle", "teacher", "IsolationForest"):
        np.testing.assert_allclose(r.methods[name].scores, plain.methods[name].scores,
                                   rtol=1e-5, equal_nan=True)


def test_a_file_without_times_trains_on_its_rows_and_evaluates_as_its_timed_copy(synthetic,
                                                                                 tmp_path):
    # a values-only export (no time column, as many benchmark files are) was refused outright;
    # with --period each row is one sample, that far apart. Reference: the same rows with the
    # times pandas.date_range gave them (the synthetic file's own) train the same network and
    # score the same; the gateway, which reads every live row's time, says what to add
    torch.set_num_threads(1)
    df = pd.read_csv(synthetic["data"]).drop(columns="time")
    df["anomaly"] = synthetic["labels"].astype(int)
    data = tmp_path / "rows.csv"
    df.to_csv(data, index=False)
    with pytest.raises(IntakeError, match="--period"):
        load_frame(data)
    with pytest.warns(UserWarning, match="no time column: each of the 900 rows"):
        frame = load_frame(data, TrainOptions(period="60s").intake())
    model_dir = tiny_bundle(frame, tmp_path)
    manifest = json.loads((tmp_path / "bundle" / "manifest.json").read_text())
    assert manifest["times_from_rows"] is True and manifest["time_column"] == "time"
    assert_evaluates_as_plain(synthetic, tmp_path / "bundle", data, None, model_dir)
    assert verify(tmp_path / "bundle", data).passed
    run = subprocess.run([sys.executable, str(tmp_path / "bundle" / "run.py"), "stream",
                          "--replay", "--input", str(data)], capture_output=True, text=True)
    assert run.returncode == 2
    assert "trained on a file without times, one sample per row 60 s apart" in run.stderr
    assert "give every row its time in a column 'time'" in run.stderr


def test_evaluate_reads_a_windows_1252_file_and_says_so_once(synthetic, tmp_path):
    # The data read three times (the workstation's frame, the gateway's feed, the report's
    # facts): its note came three times, as Python warnings with source lines.
    app = typer.Typer()
    register(app)
    df = pd.read_csv(synthetic["data"])
    df["note"] = "Störung"
    data = tmp_path / "windows.csv"
    data.write_bytes(df.to_csv(index=False).encode("cp1252"))
    r = CliRunner().invoke(app, ["evaluate", str(synthetic["bundle"]), str(data),
                                 "--incidents", str(synthetic["incidents"]), "--from", "500",
                                 "--no-baselines", "--json", str(tmp_path / "e.json")])
    assert r.exit_code == 0, r.output
    assert r.output.count("warning: windows.csv is not UTF-8: lines read as Windows-1252") == 1
    assert "UserWarning" not in r.output
    plain = evaluate(synthetic["bundle"], synthetic["data"], synthetic["incidents"],
                     eval_from=500, baselines=())
    said = json.loads((tmp_path / "e.json").read_text())["methods"]["bundle (int8, gateway path)"]
    assert said["f1"] == pytest.approx(plain.methods["bundle"].metrics["f1"])


# ---------------------------------------------------------------------------------------------
# SKAB valve1 under the benchmark's protocol


@pytest.fixture(scope="module")
def skab(tmp_path_factory):
    if not (skab_protocol.SKAB / "valve1").is_dir():
        pytest.skip("SKAB data not found at ../shared/data/skab (test data beside the repo, "
                    "not part of it)")
    # every default a user gets: the default board holds these files' teacher itself (int8,
    # nothing distilled; the 80 distillation epochs would serve a smaller board);
    # benchmarks/bench_skab.py runs the same over three seeds and every baseline; here only
    # the one the tests compare with (the others cost about a minute of POT refits)
    metrics = skab_protocol.run(0, tmp_path_factory.mktemp("skab"), workers=2,
                                baselines=("IsolationForest",))
    for name, k in metrics.items():
        print(f"SKAB valve1 pooled  {name:28s} F1 {k['f1']:.3f}  FAR {k['far']:.3f}  "
              f"MAR {k['mar']:.3f}  AUC {k['auc']:.3f}")
    return metrics


BUNDLE = skab_protocol.BUNDLE


def test_skab_bundle_f1_within_002_of_teacher(skab):
    # issue 11: the int8 bundle through the gateway path tracks the teacher
    assert abs(skab[BUNDLE]["f1"] - skab["teacher"]["f1"]) <= 0.02, skab


def test_skab_bundle_beats_isolation_forest_on_f1(skab):
    assert skab[BUNDLE]["f1"] > skab["IsolationForest"]["f1"], skab


@pytest.mark.xfail(strict=True, reason="issue 11 target not met with one set of defaults; "
                   "measured (seed 0, gateway path): see the closing note and bench_skab.py")
def test_skab_meets_the_published_best(skab):
    # The SKAB leaderboard's best (Conv-AE, as the SKAB authors publish it): F1 0.78 at FAR
    # 0.136; issue 11's target for this detector through the gateway path: F1 >= 0.80 at FAR
    # <= 0.10, and a teacher ROC AUC >= 0.85 over the same rows
    assert skab[BUNDLE]["f1"] >= 0.80 and skab[BUNDLE]["far"] <= 0.10, skab
    assert skab["teacher"]["auc"] >= 0.85, skab


# ---------------------------------------------------------------------------------------------
# how far the pooled figures move over other files (bench_skab.py prints it)


def _files(n: int, seed: int) -> list:
    """n invented files of labels and alerts, each of its own length, fault share and skill."""
    rng = np.random.default_rng(seed)
    out = []
    for _ in range(n):
        rows = int(rng.integers(300, 800))
        labels = np.zeros(rows, bool)
        labels[rows // 2:rows // 2 + int(rng.integers(50, rows // 2))] = True
        hit, false = rng.uniform(0.3, 0.95), rng.uniform(0.0, 0.3)
        out.append((labels, np.where(labels, rng.random(rows) < hit, rng.random(rows) < false)))
    return out


def test_file_interval_matches_scipy_percentile_bootstrap_over_files():
    files = _files(12, 0)
    counts = {str(i): skab_protocol.per_file(y, a) for i, (y, a) in enumerate(files)}
    ours = skab_protocol.file_interval([counts], level=0.90, resamples=20000)

    def pooled_f1(idx):  # the pooled F1 of drawn files, by point_metrics (checked on sklearn)
        idx = np.asarray(idx, int)
        return point_metrics(np.concatenate([files[i][0] for i in idx]),
                             np.concatenate([files[i][1] for i in idx]))["f1"]

    # reference: scipy.stats.bootstrap, percentile method, the files resampled as the unit
    ref = scipy.stats.bootstrap((np.arange(len(files)),), pooled_f1, vectorized=False,
                                method="percentile", confidence_level=0.90,
                                n_resamples=20000, rng=np.random.default_rng(1))
    low, high = ref.confidence_interval
    width = high - low
    assert width > 0.02  # files that differ: the pooled F1 moves with the draw
    assert ours["f1"][0] == pytest.approx(low, abs=0.05 * width)
    assert ours["f1"][1] == pytest.approx(high, abs=0.05 * width)
    whole = point_metrics(np.concatenate([y for y, _ in files]),
                          np.concatenate([a for _, a in files]))
    for key in ("f1", "far", "mar"):
        assert ours[key][0] < whole[key] < ours[key][1]


def test_file_interval_of_identical_files_is_their_pooled_figure_and_seeds_are_averaged():
    labels, alert = _files(1, 3)[0]
    one = skab_protocol.per_file(labels, alert)
    exact = point_metrics(labels, alert)  # any draw of identical files pools to the same rates
    same = skab_protocol.file_interval([{str(i): one for i in range(6)}])
    for key in ("f1", "far", "mar"):
        assert same[key] == pytest.approx((exact[key], exact[key]))
    # two seeds: the figure is the mean over seeds of each draw's pooled figure
    other = skab_protocol.per_file(labels, ~alert)
    both = skab_protocol.file_interval([{str(i): one for i in range(6)},
                                        {str(i): other for i in range(6)}])
    mean_far = (exact["far"] + point_metrics(labels, ~alert)["far"]) / 2
    assert both["far"] == pytest.approx((mean_far, mean_far))
