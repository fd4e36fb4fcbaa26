"""Compile for a board, end to end: one tiny teacher, one `ganlet compile` run, then every part
of the bundle checked against an outside reference (hashlib, hmac, tarfile, numpy, scipy,
onnx.checker, onnxruntime) and the gateway's own `run.py check`."""

from __future__ import annotations

import filecmp
import hashlib
import hmac
import json
import re
import shutil
import subprocess
import sys
import tarfile
from datetime import datetime, timedelta, timezone
from pathlib import Path

import numpy as np
import onnx
import onnxruntime as ort
import pandas as pd
import pytest
from scipy.stats import norm, rankdata, spearmanr
from synthetic import correlated_series
from typer.testing import CliRunner

import ganlet.runtime as runtime_pkg
from ganlet.compile import __version__
from ganlet.compile.boards import DEFAULT_BOARD, load_board
from ganlet.compile.calibrate import agreement, network_scores
from ganlet.compile.cli import app
from ganlet.compile.data import IntakeOptions, load_frame, split_spans
from ganlet.compile.distil import DistilConfig, distil
from ganlet.compile.model import TeacherConfig
from ganlet.compile.pack import service_unit
from ganlet.compile.pipeline import (
    STUDENTS_DIR,
    echo_learned_note,
    int8_source_file,
    student_file,
)
from ganlet.compile.sizing import size_student
from ganlet.compile.train import load_model, save_model, score_windows, train
from ganlet.runtime.lstm import Network
from ganlet.runtime.manifest import SCHEMA_VERSION
from ganlet.runtime.weights import load_weights

TINY = TeacherConfig(window=16, adversarial_epochs=2, inversion_epochs=5, encoder_hidden=(16,),
                      generator_hidden=(8, 16), discriminator_hidden=8, max_train_windows=400)
KEY = b"0123456789abcdef-test-signing-key"
# Teacher-vs-student Spearman bar on the calibration span. An untrained student already ranks
# windows at ~0.95-0.97 against this teacher (both residuals grow with |x|), so "positive" is
# no test; a distilled student reaches > 0.999 here.
DISTILLED_SPEARMAN_MIN = 0.99


@pytest.fixture(scope="module")
def teacher(tmp_path_factory):
    root = tmp_path_factory.mktemp("compile")
    df = correlated_series(1500)
    csv = root / "data.csv"
    df.to_csv(csv, index=False)
    frame = load_frame(csv, IntakeOptions(tz="Europe/Berlin"))  # station-local times
    spans = split_spans(frame, None, 0.2)
    model = train(frame, spans, TINY)
    model_dir = save_model(model, root / "model")
    return {"root": root, "df": df, "model": model, "model_dir": model_dir}


@pytest.fixture(scope="module")
def bundle(teacher):
    """`ganlet compile MODEL_DIR --out B --archive --sign-key KEY` (no --board: the default)."""
    root = teacher["root"]
    key_file = root / "key"
    key_file.write_bytes(KEY + b"\n")      # a trailing newline is not part of the key
    out = root / "B"
    started = datetime.now(timezone.utc)
    result = CliRunner().invoke(app, ["compile", str(teacher["model_dir"]), "--out", str(out),
                                      "--archive", "--sign-key", str(key_file),
                                      "--distil-epochs", "3"])
    assert result.exit_code == 0, result.output
    manifest_bytes = (out / "manifest.json").read_bytes()
    bundle_id = hashlib.sha256(manifest_bytes).hexdigest()
    record = teacher["model_dir"] / STUDENTS_DIR / f"{bundle_id[:16]}.json"
    return {"dir": out, "key_file": key_file, "stdout": result.stdout, "stderr": result.stderr,
            "started": started,
            "manifest": json.loads(manifest_bytes), "manifest_bytes": manifest_bytes,
            "fp32": student_file(teacher["model_dir"], bundle_id),
            "report": json.loads(record.read_text())["report"]}


def bundle_files(folder):
    return {p.relative_to(folder).as_posix() for p in folder.rglob("*") if p.is_file()}


def run_check(folder, *args):
    return subprocess.run([sys.executable, str(folder / "run.py"), "check", *args],
                          capture_output=True, text=True, timeout=120)


# ---------------------------------------------------------------------------------------------
# distillation and quantisation figures


def test_agreement_matches_scipy_pandas_and_numpy():
    rng = np.random.default_rng(3)
    ref = rng.gamma(2.0, 0.1, size=300)
    other = ref * (1 + 0.2 * rng.standard_normal(300)) + 0.01
    a = agreement(ref, other)
    # reference: scipy.stats.spearmanr
    assert a["spearman"] == pytest.approx(spearmanr(ref, other).statistic, abs=1e-12)
    # reference: Spearman's rho is Pearson's r of the ranks (scipy.stats.rankdata, numpy.corrcoef)
    assert a["spearman"] == pytest.approx(np.corrcoef(rankdata(ref), rankdata(other))[0, 1],
                                          abs=1e-12)
    # reference: pandas.Series.corr(method="spearman")
    assert a["spearman"] == pytest.approx(pd.Series(ref).corr(pd.Series(other), "spearman"),
                                          abs=1e-12)
    # reference: numpy max / median of absolute and relative errors
    assert a["max_abs_error"] == pytest.approx(np.max(np.abs(other - ref)), rel=1e-12)
    assert a["max_rel_error"] == pytest.approx(np.max(np.abs(other - ref) / ref), rel=1e-12)
    assert a["median_rel_error"] == pytest.approx(np.median(np.abs(other - ref) / ref), rel=1e-12)
    assert a["n"] == 300
    assert agreement(ref, -ref)["spearman"] == pytest.approx(-1.0)


def test_distilled_student_agrees_with_teacher_and_an_untrained_one_does_not(teacher, bundle):
    model = teacher["model"]
    x = model.windows_of(model.spans.calibration)
    assert len(x) > 100
    teacher_scores, _ = score_windows(model.teacher, x)
    # The distilled student: the fp32 weights `ganlet compile` kept beside the teacher.
    fp32 = dict(np.load(bundle["fp32"], allow_pickle=False))
    student_scores = network_scores(fp32, x)
    ours = agreement(teacher_scores, student_scores)
    # reference: scipy.stats.spearmanr and numpy on the same arrays
    assert ours["spearman"] == pytest.approx(spearmanr(teacher_scores, student_scores).statistic,
                                             abs=1e-12)
    assert ours["max_abs_error"] == pytest.approx(
        np.max(np.abs(student_scores.astype(np.float64) - teacher_scores)), rel=1e-9)
    # the figure the compile reported (torch student) is the one we recompute (numpy student)
    reported = bundle["report"]["teacher_vs_student"]
    assert reported["n"] == len(x)
    assert abs(reported["spearman"] - ours["spearman"]) < 1e-3
    assert f"Spearman {reported['spearman']:.4f}" in bundle["stdout"]

    # An untrained student of the same plan: distil with zero epochs.
    plan = size_student(load_board(DEFAULT_BOARD), len(model.channels),
                        model.teacher.config.latent, model.teacher.config.window,
                        model.period_s, (TINY.encoder_hidden, TINY.generator_hidden))
    untrained = agreement(teacher_scores, network_scores(
        distil(model, plan, DistilConfig(epochs=0)).weights(), x))
    print(f"\nteacher vs student on the calibration span: distilled Spearman "
          f"{ours['spearman']:.5f} (median rel error {ours['median_rel_error']:.3g}), untrained "
          f"{untrained['spearman']:.5f} (median rel error {untrained['median_rel_error']:.3g})")
    assert ours["spearman"] > DISTILLED_SPEARMAN_MIN
    assert untrained["spearman"] < DISTILLED_SPEARMAN_MIN
    assert ours["median_rel_error"] < untrained["median_rel_error"]


def test_quantisation_effect_on_scores_is_reported_and_small(teacher, bundle):
    model = teacher["model"]
    x = model.windows_of(model.spans.calibration)
    fp32 = dict(np.load(bundle["fp32"], allow_pickle=False))
    fp32_scores = network_scores(fp32, x)
    int8_scores = network_scores(load_weights(bundle["dir"] / "weights.npz"), x)
    q = agreement(fp32_scores, int8_scores)
    # reference: scipy.stats.spearmanr
    rho = spearmanr(fp32_scores, int8_scores).statistic
    assert q["spearman"] == pytest.approx(rho, abs=1e-12)
    assert rho > 0.99
    # `ganlet compile` prints the same figure (student_vs_int8 of its report)
    found = re.search(r"int8 vs fp32 student: Spearman ([\d.]+), max rel error ([\d.e+-]+)",
                      bundle["stdout"])
    assert found, bundle["stdout"]
    assert float(found.group(1)) > 0.99
    assert abs(float(found.group(1)) - rho) < 1e-3
    # the int8 weights were fitted through the rounding first (compile/int8_fit.py), and the
    # compile line says how much closer to fp32 that brought them
    fit = bundle["report"]["int8_fit"]
    assert fit["epochs"] == 6 and fit["error_fitted"] < fit["error_plain"] and fit["kept"]
    assert re.search(r"int8 fit: 6 epochs through the rounding in [\d.]+ s; on the calibration "
                     r"windows its reconstructions are [\d.]+x closer than plain rounding, kept",
                     bundle["stdout"]), bundle["stdout"]
    print(f"\nint8 vs fp32 student: Spearman {rho:.6f}, max rel error {q['max_rel_error']:.2e}")


# ---------------------------------------------------------------------------------------------
# the bundle


def test_manifest_describes_the_detector(teacher, bundle):
    m = bundle["manifest"]
    model, df = teacher["model"], teacher["df"]
    assert m["schema_version"] == SCHEMA_VERSION
    assert m["tool_version"] == __version__
    created = datetime.fromisoformat(m["created"].replace("Z", "+00:00"))
    assert bundle["started"] - timedelta(seconds=2) <= created <= datetime.now(timezone.utc)
    assert [c["name"] for c in m["channels"]] == ["flow", "power", "temp"]   # the CSV's order
    assert [c["unit"] for c in m["channels"]] == list(model.units)
    assert m["time_column"] == "time"
    assert m["time_zone"] == "Europe/Berlin"  # train's zone, the gateway's default
    # reference: pandas differences of the written timestamps (60 s grid in synthetic.py)
    assert m["period_s"] == pd.Series(df["time"]).diff().dt.total_seconds().median() == 60.0
    # robust scaler on the fit span: median and IQR / 1.349
    # reference: numpy.median / numpy.percentile; 1.349 = IQR of a standard normal (scipy.stats.norm)
    fit = df[["flow", "power", "temp"]].to_numpy()[slice(*model.spans.fit)]
    q75, q25 = np.percentile(fit, [75, 25], axis=0)
    assert m["scaler"]["kind"] == "robust"
    np.testing.assert_allclose(m["scaler"]["center"], np.median(fit, axis=0), rtol=1e-12)
    np.testing.assert_allclose(m["scaler"]["scale"], (q75 - q25) / 1.349, rtol=1e-12)
    assert 1.349 == pytest.approx(norm.ppf(0.75) - norm.ppf(0.25), abs=1e-3)
    board = load_board(DEFAULT_BOARD)
    plan = size_student(board, 3, model.teacher.config.latent, TINY.window, 60.0,
                        (TINY.encoder_hidden, TINY.generator_hidden))
    assert m["window"] == TINY.window and m["hop"] == plan.hop
    assert m["network"]["encoder"] == list(plan.encoder_hidden)
    assert m["network"]["generator"] == list(plan.generator_hidden)
    assert m["score"]["combine"] == "rms" and "residual" in m["score"]
    assert m["score"]["statistic"] == "mse+offset"
    regimes = m["score"]["regimes"]
    assert np.shape(regimes["centres"]) == np.shape(regimes["scale"])
    assert np.shape(regimes["centres"])[1] == 3 and (np.asarray(regimes["scale"]) > 0).all()
    # the tail match only ever raises a channel's scale above its median error, and the compile
    # line names the channels it raised (compile/calibrate.py tail_matched_scale)
    tails = bundle["report"]["regimes"]["tail_factor"]
    assert sorted(tails) == ["flow", "power", "temp"] and min(tails.values()) >= 1.0
    for name, factor in tails.items():
        named = f"{name} at {factor:.1f}x" in bundle["stdout"]
        assert named == (round(factor, 1) > 1.0), (name, factor, bundle["stdout"])
    # the fit span's errors only ever raise a scale too, and are named the same way
    # (compile/calibrate.py normal_scale)
    fit = bundle["report"]["regimes"]["fit_factor"]
    assert sorted(fit) == ["flow", "power", "temp"] and min(fit.values()) >= 1.0
    said = re.search(r"the fit span's errors read (.*?) the calibration span's", bundle["stdout"])
    for name, factor in fit.items():
        named = bool(said) and f"{name} at {factor:.1f}x" in said.group(1)
        assert named == (round(factor, 1) > 1.0), (name, factor, bundle["stdout"])
    # a 300-row calibration span is plenty for the tail fit: no fallback
    assert m["threshold"]["kind"] == "pot"
    # the false-alarm budget the threshold was calibrated to: q = budget x hop period / week
    fa = m["false_alarms"]
    assert fa["budget_per_week"] == 1.0
    assert fa["risk_per_hop"] == pytest.approx(60.0 * m["hop"] / (7 * 86400))
    assert m["threshold"]["q"] <= fa["risk_per_hop"]
    # the rarest rate the threshold's n scores can show: one in n + 1 hops
    assert fa["tail_scores"] == m["threshold"]["n"]
    hops_per_week = 7 * 86400 / (60.0 * m["hop"])
    assert fa["measurable_per_week"] == pytest.approx(hops_per_week / (m["threshold"]["n"] + 1))
    # with or without the CUSUM (which takes half the risk), within the budget
    assert fa["expected_per_week_at_most"] <= fa["budget_per_week"] * (1 + 1e-9)
    assert "cusum: " in bundle["stdout"]
    # held readings: the fixture's noisy channels repeat no reading, so each has a limit, and
    # compile lists them (the check's hundredth of the budget is inside the line above)
    limits = m["threshold"]["held"]["limits"]
    assert all(isinstance(n, int) and n >= 1 for n in limits)
    names = [c["name"] for c in m["channels"]]
    assert "held readings: " + "a reading repeated more times in a row than its limit alerts (" \
        + ", ".join(f"{c} {n}" for c, n in zip(names, limits)) + ")" in bundle["stdout"]
    for key in ("lo", "hi", "v_max"):
        assert len(m["drift"][key]) == 3
    # the default board when --board is omitted
    assert m["board"]["name"] == DEFAULT_BOARD
    budget, estimate = m["board"]["budget"], m["board"]["estimate"]
    assert budget["storage_kb"] == board.storage_budget_kb
    assert budget["ram_mb"] == board.ram_budget_mb
    assert estimate["storage_kb"] <= budget["storage_kb"]
    assert estimate["ram_mb"] <= budget["ram_mb"]
    assert estimate["hop_ms"] <= budget["hop_ms"]
    assert estimate["flops_per_hop"] == plan.flops_per_hop


def test_every_file_is_hashed_and_the_signature_is_hmac_sha256(bundle):
    folder, m = bundle["dir"], bundle["manifest"]
    present = bundle_files(folder)
    assert {"manifest.json", "manifest.hmac", "model.onnx", "weights.npz", "run.py",
            "INSTALL.txt", "ganlet/__init__.py", "ganlet/runtime/lstm.py"} <= present
    assert set(m["files"]) == present - {"manifest.json", "manifest.hmac"}
    for rel, digest in m["files"].items():
        # reference: hashlib.sha256
        assert hashlib.sha256((folder / rel).read_bytes()).hexdigest() == digest, rel
    # reference: hmac (RFC 2104) with SHA-256 over the exact manifest bytes
    expected = hmac.new(KEY, bundle["manifest_bytes"], hashlib.sha256).hexdigest()
    assert (folder / "manifest.hmac").read_text().strip() == expected


def test_flash_use_is_within_the_estimate_and_the_budget(bundle):
    folder, m = bundle["dir"], bundle["manifest"]
    core = sum((folder / rel).stat().st_size for rel in bundle_files(folder)
               if not rel.startswith("ganlet/"))
    assert core <= m["board"]["estimate"]["storage_kb"] * 1024
    assert core <= m["board"]["budget"]["storage_kb"] * 1024


def test_runtime_copy_is_the_runtime_package(bundle):
    src = Path(runtime_pkg.__file__).parent
    copied = sorted(p.name for p in (bundle["dir"] / "ganlet" / "runtime").glob("*.py"))
    expected = sorted(p.name for p in src.glob("*.py"))
    assert copied == expected
    # reference: filecmp (byte-for-byte)
    _, mismatch, errors = filecmp.cmpfiles(src, bundle["dir"] / "ganlet" / "runtime", expected,
                                           shallow=False)
    assert mismatch == [] and errors == []


def test_weights_npz_is_int8_with_row_scales(teacher, bundle):
    # reference: numpy.load without pickles
    with np.load(bundle["dir"] / "weights.npz", allow_pickle=False) as npz:
        raw = {k: npz[k] for k in npz.files}
    # the int8 weights round the weights fitted through the rounding (compile/int8_fit.py),
    # which the workstation keeps beside the fp32 student; the fit moved them
    bundle_id = hashlib.sha256(bundle["manifest_bytes"]).hexdigest()
    fp32 = dict(np.load(int8_source_file(teacher["model_dir"], bundle_id), allow_pickle=False))
    student = dict(np.load(bundle["fp32"], allow_pickle=False))
    assert set(fp32) == set(student) and any(not np.array_equal(fp32[k], student[k])
                                             for k in fp32)
    matrices = [k for k in fp32 if k.endswith((".W", ".R"))]
    assert set(raw) == set(fp32) | {k + ".scale" for k in matrices}
    for key in fp32:
        if key in matrices:
            axis = 0 if key.endswith("head.W") else 1
            assert raw[key].dtype == np.int8 and raw[key].shape == fp32[key].shape
            scale = raw[key + ".scale"]
            assert scale.dtype == np.float32 and scale.shape == (fp32[key].shape[axis],)
            shape = [1] * fp32[key].ndim
            shape[axis] = -1
            s = scale.reshape(shape)
            # reference: ONNX QuantizeLinear rounds to nearest: |w - q * s| <= s / 2
            err = np.abs(fp32[key] - raw[key].astype(np.float32) * s)
            assert (err <= s / 2 * (1 + 1e-5) + 1e-12).all(), key
            assert np.abs(raw[key]).max() <= 127       # symmetric: max |w| / 127
        else:
            assert raw[key].dtype == np.float32
            np.testing.assert_array_equal(raw[key], fp32[key])


def test_onnx_model_checks_and_matches_the_numpy_network(teacher, bundle):
    path = bundle["dir"] / "model.onnx"
    # reference: onnx.checker
    onnx.checker.check_model(onnx.load(path), full_check=True)
    model = teacher["model"]
    x = model.windows_of(model.spans.calibration)[:200]
    # reference: onnxruntime's LSTM / DequantizeLinear kernels
    session = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"])
    recon, res = session.run(["reconstruction", "residuals"], {"window": x})
    net_recon, net_res = Network(load_weights(bundle["dir"] / "weights.npz")).forward(x)
    np.testing.assert_allclose(res, net_res, rtol=1e-5, atol=0)
    np.testing.assert_allclose(recon, net_recon, rtol=1e-5, atol=1e-6)


def test_install_notes_and_archive(bundle):
    text = (bundle["dir"] / "INSTALL.txt").read_text()
    assert "systemd" in text and "[Service]" in text and "ExecStart=" in text
    assert "advisory" in text and "NOT a safety function" in text
    archive = bundle["dir"].with_name("B.tar.gz")
    # reference: tarfile
    with tarfile.open(archive, "r:gz") as tar:
        names = {t.name for t in tar.getmembers() if t.isfile()}
    assert names == {f"B/{rel}" for rel in bundle_files(bundle["dir"])}


def test_run_py_check_accepts_the_bundle_and_refuses_tampering(bundle, tmp_path):
    key = str(bundle["key_file"])
    ok = run_check(bundle["dir"], "--key", key, "--require-signature")
    assert ok.returncode == 0, ok.stderr
    assert "bundle OK" in ok.stdout and "signed" in ok.stdout
    assert DEFAULT_BOARD in ok.stdout
    # the settings an operator asks about, as the manifest states them
    manifest = json.loads((bundle["dir"] / "manifest.json").read_text())
    budget = manifest["false_alarms"]["budget_per_week"]
    assert f"false-alarm budget {budget:g} a week" in ok.stdout
    # this fixture's short history cannot show a rate of 1 a week, and check says so
    fa = manifest["false_alarms"]
    assert fa["measurable_per_week"] > budget
    assert (f"the {fa['tail_scores']} scores the threshold was fitted on show rates down to "
            f"{fa['measurable_per_week']:.3g} a week only" in ok.stdout)
    assert (f"closed below {manifest['alerting']['close_ratio']:g} x threshold"
            in ok.stdout)
    assert "drift: reported once, re-centred onto the training range" in ok.stdout
    assert manifest["drift"]["alert_steps"] is True  # compile's default
    assert "a channel that has stepped out of its training range for a window" in ok.stdout
    held = manifest["threshold"]["held"]["limits"]
    assert ("or while a reading repeats more times in a row than its limit (" + ", ".join(
        f"{c['name']} {n}" for c, n in zip(manifest["channels"], held)) + ")") in ok.stdout
    cusum = manifest["threshold"].get("cusum")
    said = f"holds a rise above {cusum['limit']:.3g}" if cusum else "CUSUM"
    if cusum and cusum.get("state_change_as_median"):  # compile fits it so (runtime/cusum.py)
        said += " (a window holding a change of operating state counts as normal)"
    assert (said in ok.stdout) if cusum else (said not in ok.stdout)

    copy = tmp_path / "B"
    shutil.copytree(bundle["dir"], copy)
    weights = copy / "weights.npz"
    data = bytearray(weights.read_bytes())
    data[len(data) // 2] ^= 0x01
    weights.write_bytes(bytes(data))
    bad = run_check(copy, "--key", key, "--require-signature")
    assert bad.returncode != 0
    assert "weights.npz" in bad.stderr

    # a changed manifest no longer matches its signature
    shutil.copy2(bundle["dir"] / "weights.npz", weights)
    manifest = copy / "manifest.json"
    manifest.write_bytes(manifest.read_bytes().replace(b'"hop": ', b'"hop":  ', 1))
    bad = run_check(copy, "--key", key, "--require-signature")
    assert bad.returncode != 0 and "signature" in bad.stderr


def test_the_bundle_ships_its_unit_with_the_signature_options(bundle, tmp_path):
    name = bundle["manifest"]["name"]
    assert bundle["manifest"]["signing"] == ["hmac-sha256"]
    unit_file = bundle["dir"] / f"ganlet-{name}.service"
    unit = unit_file.read_text()
    assert unit == service_unit(name, ["hmac-sha256"])
    assert "--require-signature" in unit and unit in (bundle["dir"] / "INSTALL.txt").read_text()
    assert f"ganlet-{name}.service" in bundle["manifest"]["files"]  # hashed like the rest
    if shutil.which("systemd-analyze"):
        # reference: systemd's own unit parser
        p = subprocess.run(["systemd-analyze", "verify", str(unit_file)], capture_output=True,
                           text=True)
        assert p.returncode == 0 and unit_file.name not in p.stderr, p.stderr


def test_keypair_and_compile_with_an_ed25519_signature(teacher, tmp_path):
    pytest.importorskip("cryptography")
    made = CliRunner().invoke(app, ["keypair", str(tmp_path / "keys" / "site-7")])
    assert made.exit_code == 0, made.output
    private = tmp_path / "keys" / "site-7.ed25519-private.pem"
    public = tmp_path / "keys" / "site-7.ed25519-public.pem"
    assert private.stat().st_mode & 0o777 == 0o600
    again = CliRunner().invoke(app, ["keypair", str(tmp_path / "keys" / "site-7")])
    assert again.exit_code == 2 and "never overwritten" in again.stderr
    wrong = CliRunner().invoke(app, ["compile", str(teacher["model_dir"]), "--out",
                                     str(tmp_path / "W"), "--sign-ed25519", str(public)])
    assert wrong.exit_code == 2 and "not a PEM private key" in wrong.stderr
    out = tmp_path / "E"
    result = CliRunner().invoke(app, ["compile", str(teacher["model_dir"]), "--out", str(out),
                                      "--sign-ed25519", str(private), "--name", "pump-7",
                                      "--distil-epochs", "1", "--quiet"])
    assert result.exit_code == 0, result.output
    assert json.loads((out / "manifest.json").read_text())["signing"] == ["ed25519"]
    assert not (out / "manifest.hmac").exists()
    if shutil.which("openssl"):
        sig = tmp_path / "sig.bin"
        sig.write_bytes(bytes.fromhex((out / "manifest.ed25519").read_text().strip()))
        # reference: OpenSSL's Ed25519 (RFC 8032) verification of the manifest bytes
        p = subprocess.run(["openssl", "pkeyutl", "-verify", "-pubin", "-inkey", str(public),
                            "-rawin", "-in", str(out / "manifest.json"), "-sigfile", str(sig)],
                           capture_output=True, text=True)
        assert p.returncode == 0, p.stderr
    ok = run_check(out, "--public-key", str(public), "--require-signature")
    assert ok.returncode == 0 and "signed (ed25519 verified)" in ok.stdout, ok.stderr
    assert "--public-key" in (out / "ganlet-pump-7.service").read_text()


@pytest.mark.parametrize("kind", ["file", "folder"])
def test_out_that_is_not_a_bundle_is_refused_before_distillation(teacher, tmp_path, kind,
                                                                 monkeypatch):
    import ganlet.compile.distil as distil_mod

    def no_distil(*_args, **_kwargs):
        raise AssertionError("distillation started before --out was checked")

    # compile distils through compile/student_cache.py, which calls distil.distil
    monkeypatch.setattr(distil_mod, "distil", no_distil)
    out = tmp_path / "out"
    if kind == "file":
        out.write_text("not a folder")
    else:
        out.mkdir()
        (out / "notes.txt").write_text("someone's files")
    result = CliRunner().invoke(app, ["compile", str(teacher["model_dir"]), "--out", str(out)])
    assert result.exit_code == 2, result.output
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: ") and str(out) in lines[0]
    assert (out.read_text() == "not a folder" if kind == "file"
            else (out / "notes.txt").read_text() == "someone's files")


def test_compile_repeats_trains_note_when_the_network_learned_only_levels(teacher, bundle,
                                                                          tmp_path):
    # whoever compiles may not have seen `ganlet train`'s output (pipeline.learned_summary)
    model_dir = tmp_path / "model"
    shutil.copytree(teacher["model_dir"], model_dir)
    history_file = model_dir / "history.json"
    history = json.loads(history_file.read_text())
    names = list(history["fit_r2"])
    # the fixture's `ganlet compile` said it exactly when this tiny teacher learned so little
    learned_little = max(history["fit_r2"].values()) < 0.1
    assert ("note: the network reconstructs no channel" in bundle["stderr"]) == learned_little

    def said(r2) -> list:
        lines = []
        if r2 is None:
            history.pop("fit_r2", None)  # a model trained before fit_r2 was recorded
        else:
            history["fit_r2"] = dict(zip(names, r2))
        history_file.write_text(json.dumps(history))
        echo_learned_note(load_model(model_dir), lines.append)
        return lines

    level_only = said([0.02] * len(names))
    assert len(level_only) == 1 and level_only[0].startswith(
        "note: the network reconstructs no channel better than R2 0.1")
    assert said([0.02] * (len(names) - 1) + [0.5]) == []
    assert said(None) == []
