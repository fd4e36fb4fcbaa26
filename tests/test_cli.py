"""The `ganlet` command: help everywhere, the version, one-line errors with exit code 2, and the
model directory `ganlet train` writes."""

from __future__ import annotations

import importlib.metadata
import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import torch
import typer
from synthetic import correlated_series
from typer.testing import CliRunner

from ganlet.compile.cli import app
from ganlet.compile.data import RobustScaler
from ganlet.compile.model import Teacher, TeacherConfig
from ganlet.compile.train import load_model

pytestmark = pytest.mark.usefixtures("one_torch_thread")

GANLET = Path(sys.executable).with_name("ganlet")     # the installed entry point
TINY = {"encoder_hidden": [4], "generator_hidden": [4], "discriminator_hidden": 4,
        "adversarial_epochs": 2, "inversion_epochs": 2, "window": 8, "max_train_windows": 200}
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"                   # reference: PNG specification, section 5.2


def run(*args):
    return CliRunner().invoke(app, [str(a) for a in args])


def assert_one_error_line(result, *fragments):
    assert result.exit_code == 2, result.output
    errors = [ln for ln in result.stderr.splitlines() if ln.startswith("error:")]
    assert len(errors) == 1, result.stderr
    assert "Traceback" not in result.output
    assert result.exception is None or isinstance(result.exception, SystemExit)
    for fragment in fragments:
        assert fragment in errors[0], errors[0]


@pytest.fixture
def config_file(tmp_path):
    def write(**overrides) -> Path:
        path = tmp_path / f"cfg{len(list(tmp_path.glob('cfg*')))}.json"
        path.write_text(json.dumps({**TINY, **overrides}))
        return path

    return write


def test_help_works_on_every_registered_command():
    commands = typer.main.get_command(app).commands
    assert {"train", "demo"} <= set(commands)
    top = run("--help")
    assert top.exit_code == 0 and "Usage" in top.stdout
    for name in commands:
        result = run(name, "--help")
        assert result.exit_code == 0, (name, result.output)
        assert "Usage" in result.stdout and name in result.stdout


def test_version_matches_the_installed_distribution():
    result = run("--version")
    assert result.exit_code == 0
    # reference: importlib.metadata, the version pip installed
    assert result.stdout.strip() == f"ganlet {importlib.metadata.version('ganlet')}"


def test_installed_entry_point_and_module_run():
    assert GANLET.exists(), f"{GANLET}: the console script is not installed"
    for cmd in ([str(GANLET), "--help"], [sys.executable, "-m", "ganlet.compile.cli", "--help"],
                [sys.executable, "-m", "ganlet", "--help"]):
        proc = subprocess.run(cmd, capture_output=True, text=True, timeout=120)
        assert proc.returncode == 0, proc.stderr
        assert "train" in proc.stdout and "Usage" in proc.stdout
    proc = subprocess.run([str(GANLET), "--version"], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0 and proc.stdout.strip().startswith("ganlet ")


def test_real_process_bad_input_is_one_line_without_traceback(tmp_path):
    proc = subprocess.run([str(GANLET), "train", str(tmp_path / "missing.csv"), "--out",
                           str(tmp_path / "m")], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2
    assert proc.stderr.splitlines() == [f"error: {tmp_path / 'missing.csv'}: no such file"]
    assert proc.stdout == ""


def test_missing_file(tmp_path):
    result = run("train", tmp_path / "missing.csv", "--out", tmp_path / "m")
    assert_one_error_line(result, "missing.csv: no such file")
    assert result.stderr.count("\n") == 1
    assert not (tmp_path / "m").exists()


def test_a_kept_model_is_reused_only_with_the_configuration_it_was_trained_with(
        tmp_path, write_csv, config_file):
    from dataclasses import asdict, replace

    from ganlet.compile.demo import kept_model  # bench_demo.py --keep

    out, asked = tmp_path / "model", tmp_path / "model_asked.json"
    trained = run("train", write_csv(correlated_series(300)), "--out", out, "--config",
                  config_file())
    assert trained.exit_code == 0, trained.output
    config = TeacherConfig(**TINY)
    assert kept_model(out, asked, config) is None          # no record of how it was trained
    asked.write_text(json.dumps(asdict(config)))
    kept = kept_model(out, asked, config)
    assert kept is not None and kept.out == out and kept.model.channels == ["flow", "power", "temp"]
    assert kept_model(out, asked, replace(config, seed=config.seed + 1)) is None
    assert kept_model(tmp_path / "elsewhere", asked, config) is None


def test_a_constant_channel_picked_by_default_is_left_out_with_a_note(tmp_path, write_csv,
                                                                      config_file):
    df = correlated_series(300)
    df["setpoint"] = 4.0                               # a column that never moved in training
    out = tmp_path / "m"
    result = run("train", write_csv(df), "--out", out, "--config", config_file())
    assert result.exit_code == 0, result.output
    assert "note: channel 'setpoint' is constant over the training span (value 4): left out" \
        in result.output
    assert len(json.loads((out / "scaler.json").read_text())["center"]) == 3
    summary = json.loads((out / "data_summary.json").read_text())
    assert summary["channels"] == ["flow", "power", "temp"] and "setpoint" in summary["excluded"]


@pytest.mark.parametrize("code", [-9999.0, 65535.0])
def test_a_logger_code_among_readings_is_refused_with_the_fix(tmp_path, write_csv, config_file,
                                                              code):
    # -9999 for a missing reading (or an ADC's 65535) in a temperature column had been trained
    # on as a reading: thousands of sigmas, in the windows the thresholds are calibrated on
    df = correlated_series(300)
    df.loc[[40, 170, 171], "temp"] = code
    out = tmp_path / "m"
    result = run("train", write_csv(df), "--out", out, "--config", config_file())
    assert_one_error_line(result, f"channel 'temp' reads exactly {code:g} in 3 rows")
    assert f"replace({code:g}, float('nan'))" in result.stderr and not out.exists()
    # the fix the message gives (reference: pandas.Series.replace) trains
    df["temp"] = df["temp"].replace(code, float("nan"))
    fixed = run("train", write_csv(df, name="fixed.csv"), "--out", out, "--config",
                config_file())
    assert fixed.exit_code == 0, fixed.output
    # one wild reading, or a dropout to 0 within reach of the range, is not a code
    df.loc[40, "temp"], df.loc[[100, 101], "flow"] = code, 0.0
    kept = run("train", write_csv(df, name="kept.csv"), "--out", tmp_path / "m2", "--config",
               config_file())
    assert kept.exit_code == 0, kept.output


def test_a_constant_channel_the_engineer_named_is_refused(tmp_path, write_csv):
    df = correlated_series(300)
    df["power"] = 4.0
    named = ("--channels", "flow,power,temp")
    result = run("train", write_csv(df), "--out", tmp_path / "m", "--quiet", *named)
    assert_one_error_line(result, "channel 'power' is constant over the training span")
    assert result.stderr.count("\n") == 1
    noisy = run("train", write_csv(df), "--out", tmp_path / "m", *named)   # summary, then error
    assert_one_error_line(noisy, "channel 'power' is constant")
    df["flow"] = df["temp"] = 1.0
    assert_one_error_line(run("train", write_csv(df), "--out", tmp_path / "m"),
                          "every channel is constant over the training span")


@pytest.mark.parametrize("period, fragment", [
    ("soon", "--period 'soon' is not a duration"),
    ("-5", "--period must be positive"),
    ("0", "--period must be positive"),
])
def test_bad_period(tmp_path, write_csv, period, fragment):
    result = run("train", write_csv(correlated_series(200)), "--out", tmp_path / "m",
                 f"--period={period}", "--quiet")
    assert_one_error_line(result, fragment)


def test_bad_train_until_and_config_field(tmp_path, write_csv, config_file):
    data = write_csv(correlated_series(200))
    assert_one_error_line(run("train", data, "--out", tmp_path / "m", "--train-until", "1.5"),
                          "--train-until 1.5: a fraction must lie in (0, 1]")
    bad = tmp_path / "bad.json"
    bad.write_text(json.dumps({"windw": 16}))
    assert_one_error_line(run("train", data, "--out", tmp_path / "m", "--config", bad),
                          "unknown config field(s): windw")


def test_train_writes_the_model_directory(tmp_path, write_csv, config_file):
    data = write_csv(correlated_series(300))
    out = tmp_path / "model"
    result = run("train", data, "--out", out, "--config", config_file())
    assert result.exit_code == 0, result.output
    assert "trained on" in result.stdout and str(out) in result.stdout

    for name in ("generator.pt", "encoder.pt", "discriminator.pt", "config.json", "scaler.json",
                 "data_summary.json", "history.json", "training.png", "model.json", "series.npz"):
        assert (out / name).is_file(), name
    config = TeacherConfig.from_json(json.loads((out / "config.json").read_text()))
    assert config.window == 8 and config.adversarial_epochs == 2
    fresh = Teacher.build(3, config)
    for part in ("generator", "encoder", "discriminator"):
        state = torch.load(out / f"{part}.pt", weights_only=True)
        expected = getattr(fresh, part).state_dict()
        assert state.keys() == expected.keys()
        assert all(state[k].shape == expected[k].shape for k in state)
        getattr(fresh, part).load_state_dict(state)         # loads strictly

    history = json.loads((out / "history.json").read_text())
    assert len(history["adversarial"]) == 2 and len(history["inversion"]) == 2
    assert set(history["adversarial"][0]) == {"d_loss", "g_loss"}
    assert all(np.isfinite(r["recon"]) and r["recon"] > 0 for r in history["inversion"])
    assert set(history["wall_s"]) == {"adversarial", "inversion", "total"}

    png = (out / "training.png").read_bytes()
    assert png[:8] == PNG_SIGNATURE
    import matplotlib.image

    assert matplotlib.image.imread(out / "training.png").ndim == 3   # reference: matplotlib

    summary = json.loads((out / "data_summary.json").read_text())
    assert summary["channels"] == ["flow", "power", "temp"] and summary["rows_read"] == 300
    meta = json.loads((out / "model.json").read_text())
    assert meta["format"] == "ganlet.model/1" and meta["spans"]["calibration"] == [240, 300]
    scaler = RobustScaler.from_json(json.loads((out / "scaler.json").read_text()))
    raw = pd.read_csv(data)[["flow", "power", "temp"]]                # reference: pandas
    assert scaler.center == pytest.approx(raw.iloc[:240].median().tolist())
    series = np.load(out / "series.npz")["series"]
    np.testing.assert_allclose(series, scaler.transform(raw.to_numpy()), rtol=1e-6)
    assert load_model(out).channels == ["flow", "power", "temp"]


def test_quiet_prints_nothing_to_stdout_and_warnings_go_to_stderr(tmp_path, write_csv,
                                                                   config_file):
    data = write_csv(correlated_series(400))
    result = run("train", data, "--out", tmp_path / "m", "--config", config_file(),
                 "--window", "128", "--quiet")
    assert result.exit_code == 0, result.output
    assert result.stdout == ""
    assert "warning: short history: using a window of 72 points instead of 128" in result.stderr
    assert json.loads((tmp_path / "m" / "config.json").read_text())["window"] == 72


def test_seed_from_the_config_file_is_kept_unless_seed_is_given(tmp_path, write_csv, config_file):
    data = write_csv(correlated_series(200))
    outs = {}
    for key, args in {"file5": ["--config", config_file(seed=5)],
                      "flag5": ["--config", config_file(), "--seed", "5"],
                      "flag0": ["--config", config_file(seed=5), "--seed", "0"]}.items():
        assert run("train", data, "--out", tmp_path / key, "--quiet", *args).exit_code == 0
        outs[key] = torch.load(tmp_path / key / "generator.pt", weights_only=True)
        assert json.loads((tmp_path / key / "config.json").read_text())["seed"] == (
            0 if key == "flag0" else 5)
    assert all(torch.equal(outs["file5"][k], outs["flag5"][k]) for k in outs["file5"])
    assert any(not torch.equal(outs["file5"][k], outs["flag0"][k]) for k in outs["file5"])


# Runs the `ganlet` command as `python -m ganlet` with an import blocker installed first, as on a
# machine where the `compile` extra was never installed: importing a blocked package raises
# ModuleNotFoundError, exactly as Python does for a package that is absent.
WITHOUT_EXTRA = r"""
import importlib.abc, runpy, sys
BLOCK = set(sys.argv[1].split(","))
class Blocker(importlib.abc.MetaPathFinder):
    def find_spec(self, name, path=None, target=None):
        if name.split(".")[0] in BLOCK:
            raise ModuleNotFoundError(f"No module named {name!r}", name=name)
        return None
sys.meta_path.insert(0, Blocker())
sys.argv = ["ganlet"] + sys.argv[2:]
runpy.run_module("ganlet", run_name="__main__", alter_sys=True)
"""


@pytest.mark.parametrize("blocked", ["torch,typer,click,rich,pandas,onnx,onnxruntime,matplotlib,"
                                     "sklearn,scipy,dask,pyarrow", "torch"],
                         ids=["no extra at all", "torch missing"])
def test_without_the_compile_extra_the_command_says_what_to_install(tmp_path, write_csv,
                                                                    blocked):
    data = write_csv(correlated_series(100))
    proc = subprocess.run([sys.executable, "-c", WITHOUT_EXTRA, blocked, "train", str(data),
                           "--out", str(tmp_path / "m")],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2, proc.stderr
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in proc.stderr, proc.stderr
    assert "'compile' extra" in lines[0] and 'pip install "ganlet[compile]"' in lines[0]
    missing = blocked.split(",")[0] if blocked == "torch" else "typer"   # the first one met
    assert f"({missing} is not installed)" in lines[0]


def test_ctrl_c_during_training_says_it_was_interrupted(tmp_path, write_csv, config_file):
    import signal
    import time

    data = write_csv(correlated_series(600))
    out = tmp_path / "m"
    slow = config_file(adversarial_epochs=5000, inversion_epochs=5000, max_train_windows=2000)
    env = {**os.environ, "OMP_NUM_THREADS": "1"}
    # Ctrl-C as a terminal delivers it: SIGINT at its default disposition in the child, even
    # when this test runs from a background job (which starts with SIGINT ignored, POSIX)
    proc = subprocess.Popen([str(GANLET), "train", str(data), "--out", str(out), "--config",
                             str(slow)], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True, env=env,
                            preexec_fn=lambda: signal.signal(signal.SIGINT, signal.SIG_DFL))
    try:
        seen = ""
        for line in proc.stderr:                  # the data summary: training comes next
            seen += line
            if line.startswith("  temp"):
                break
        time.sleep(3.0)                           # well inside the 5000 epochs
        assert proc.poll() is None, seen           # precondition: still training
        proc.send_signal(signal.SIGINT)
        _, rest = proc.communicate(timeout=120)
    finally:
        proc.kill()                               # never leave a 5000-epoch run behind
    assert proc.returncode == 130, seen + rest
    assert "interrupted (Ctrl-C): training stopped" in rest and str(out) in rest
    assert "Traceback" not in rest and "Aborted" not in rest
    assert not (out / "model.json").exists()
