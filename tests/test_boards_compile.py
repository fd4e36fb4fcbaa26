"""Compile for several boards (issue 14): a board too small for the teacher gets the largest
student that fits and says what that costs; one command compiles several boards and distils
each student once; a distilled student is reused while its teacher, plan and config are
unchanged and never after one of them changed; --threads sets torch's thread count inside the
run (train and compile); the manifest carries the fidelity figures the compile printed."""

from __future__ import annotations

import hashlib
import json
import shutil
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
import threadpoolctl
import torch
from scipy.stats import spearmanr
from sklearn.metrics import f1_score
from synthetic import correlated_series
from test_sizing import write_board
from typer.testing import CliRunner

import ganlet.compile.distil as distil_mod
from ganlet.compile import pipeline, threads
from ganlet.compile.boards import list_boards, load_board
from ganlet.compile.calibrate import network_scores
from ganlet.compile.cli import app
from ganlet.compile.data import IntakeOptions, load_frame, split_spans
from ganlet.compile.distil import DistilConfig
from ganlet.compile.fidelity import ALARM_QUANTILE, detection_f1, fault_set
from ganlet.compile.model import TeacherConfig
from ganlet.compile.pipeline import CompileOptions, compile_boards_dir, compile_dir, plan_board
from ganlet.compile.sizing import ladder, plan_for
from ganlet.compile.student_cache import CACHE_DIR
from ganlet.compile.train import load_model, save_model, score_windows, train
from ganlet.runtime.weights import load_weights

TINY = TeacherConfig(window=16, adversarial_epochs=1, inversion_epochs=4, encoder_hidden=(16,),
                     generator_hidden=(8, 16), discriminator_hidden=6, max_train_windows=300)
QUICK = DistilConfig(epochs=2, max_real_windows=300)


@pytest.fixture(scope="module")
def model_dir(tmp_path_factory, one_torch_thread):
    root = tmp_path_factory.mktemp("boards")
    csv = root / "data.csv"
    correlated_series(1200).to_csv(csv, index=False)
    frame = load_frame(csv, IntakeOptions())
    return save_model(train(frame, split_spans(frame, None, 0.2), TINY), root / "model")


@pytest.fixture(scope="module")
def boards(model_dir, tmp_path_factory):
    """roomy: holds the teacher. tight: 1 KB of flash less than the teacher's estimate, so it
    holds the next rung down. tight-twin: the same budgets under another name. tighter: holds
    only a rung further down."""
    root = tmp_path_factory.mktemp("board-files")
    model = load_model(model_dir)
    cfg = model.teacher.config
    rungs = ladder(3, cfg.latent, (cfg.encoder_hidden, cfg.generator_hidden))
    roomy = load_board(write_board(root / "roomy.toml", name="roomy"))

    def storage_kb(rung):
        return plan_for(roomy, 3, cfg.latent, *rungs[rung][:2], cfg.window, 1,
                        model.period_s, model.spans.calibration[1]).storage_bytes / 1024

    paths = {"roomy": root / "roomy.toml"}
    for name, rung in (("tight", 0), ("tight-twin", 0), ("tighter", 1)):
        paths[name] = write_board(root / f"{name}.toml", name=name,
                                  storage_budget_kb=int(storage_kb(rung)) - 1)
    return {"paths": {k: str(v) for k, v in paths.items()}, "rungs": rungs}


def options(board: str, **changes) -> CompileOptions:
    return CompileOptions(board=board, name="t", distil=changes.pop("distil", QUICK), **changes)


def count_distillations(monkeypatch, model_dir: Path) -> list:
    """Every real distillation (the cache calls distil.distil only on a miss), starting from
    an empty cache so that the tests do not depend on their order."""
    shutil.rmtree(model_dir / CACHE_DIR, ignore_errors=True)
    calls = []
    real = distil_mod.distil

    def counted(model, plan, cfg=None, progress=None):
        calls.append((plan.encoder_hidden, plan.generator_hidden, cfg.seed))
        return real(model, plan, cfg, progress=progress)

    monkeypatch.setattr(distil_mod, "distil", counted)
    return calls


# ---------------------------------------------------------------------------------------------
# sizing that means something


def test_a_board_too_small_for_the_teacher_gets_a_smaller_student_that_fits(model_dir, boards,
                                                                           tmp_path):
    shutil.rmtree(model_dir / CACHE_DIR, ignore_errors=True)
    result = compile_dir(model_dir, tmp_path / "b", options(boards["paths"]["tight"]))
    plan, board = result.plan, result.board
    assert not plan.teacher
    assert (plan.encoder_hidden, plan.generator_hidden) == boards["rungs"][1][:2]
    manifest = json.loads((result.bundle / "manifest.json").read_text())
    assert manifest["network"]["encoder"] == list(plan.encoder_hidden)
    # the packed bundle (files on disk, counted with pathlib) fits the board's flash
    core = sum(p.stat().st_size for p in result.bundle.rglob("*")
               if p.is_file() and not p.relative_to(result.bundle).as_posix().startswith("ganlet/"))
    assert core <= board.storage_budget_kb * 1024
    text = result.describe()
    assert "cannot hold the teacher itself" in text and "storage" in text
    assert result.report["student"]["source"] == "distilled"


def test_the_manifest_records_the_fidelity_the_gateway_numbers_give(model_dir, boards, tmp_path):
    result = compile_dir(model_dir, tmp_path / "b", options(boards["paths"]["tight"]))
    fid = json.loads((result.bundle / "manifest.json").read_text())["fidelity"]
    assert fid == json.loads(json.dumps(result.report["fidelity"]))
    # recompute from outside the compile: the bundle's own int8 weights through the gateway's
    # loader, the teacher's scores; Spearman by scipy.stats.spearmanr
    model = load_model(model_dir)
    faults = fault_set(model)
    device = network_scores(load_weights(result.bundle / "weights.npz"), faults.windows)
    clean = model.windows_of(model.spans.calibration)
    teacher, _ = score_windows(model.teacher, clean)
    n = len(clean)
    assert fid["windows"] == n == faults.clean
    assert fid["spearman"] == pytest.approx(spearmanr(teacher, device[:n]).statistic, abs=1e-9)
    assert fid["max_abs_error"] == pytest.approx(np.max(np.abs(device[:n] - teacher)), rel=1e-5)
    assert fid["f1_gap"] == pytest.approx(fid["f1_teacher"] - fid["f1_device"])
    assert f"Spearman {fid['spearman']:.4f}" in result.describe()


def test_detection_f1_is_sklearn_f1_of_flags_above_the_clean_quantile():
    rng = np.random.default_rng(5)
    clean, faulty = rng.gamma(2.0, 1.0, 400), rng.gamma(2.0, 1.0, 400) + rng.uniform(0, 6, 400)
    scores = np.concatenate([clean, faulty])
    flags = scores > np.quantile(clean, ALARM_QUANTILE)
    truth = np.r_[np.zeros(400, bool), np.ones(400, bool)]
    # reference: sklearn.metrics.f1_score
    assert detection_f1(scores, 400) == pytest.approx(f1_score(truth, flags))
    assert detection_f1(np.r_[clean, clean], 400) < 0.05      # nothing to find: ~no true flags


# ---------------------------------------------------------------------------------------------
# no work done twice


def test_one_command_compiles_several_boards_and_distils_a_shared_student_once(
        model_dir, boards, tmp_path, monkeypatch):
    calls = count_distillations(monkeypatch, model_dir)
    p = boards["paths"]
    out = tmp_path / "out"
    # `ganlet compile MODEL --board roomy.toml,tight.toml,tight-twin.toml --out OUT` in process
    result = CliRunner().invoke(app, ["compile", str(model_dir), "--out", str(out), "--board",
                                      f"{p['roomy']},{p['tight']},{p['tight-twin']}",
                                      "--distil-epochs", "2"])
    assert result.exit_code == 0, result.output
    assert len(calls) == 1               # tight and tight-twin share one student
    manifests = {b: json.loads((out / b / "manifest.json").read_text())
                 for b in ("roomy", "tight", "tight-twin")}
    teacher_shape = [list(s) for s in boards["rungs"][0][:2]]
    assert [manifests["roomy"]["network"][k] for k in ("encoder", "generator")] == teacher_shape
    assert manifests["tight"]["network"] == manifests["tight-twin"]["network"]
    assert manifests["tight"]["network"]["encoder"] != teacher_shape[0]
    # the twin's weights are the same student, byte for byte
    assert ((out / "tight" / "weights.npz").read_bytes()
            == (out / "tight-twin" / "weights.npz").read_bytes())
    # a table of every board with its fidelity
    for board in ("roomy", "tight", "tight-twin"):
        assert board in result.stdout
        assert manifests[board]["fidelity"]["network"] == ("teacher" if board == "roomy"
                                                           else "student")
    assert "F1 gap" in result.stdout
    # the teacher itself, int8, follows the teacher at least as closely as the tiny student
    assert (manifests["roomy"]["fidelity"]["spearman"]
            >= manifests["tight"]["fidelity"]["spearman"])


def test_board_all_compiles_every_shipped_profile(model_dir, tmp_path):
    results = compile_boards_dir(model_dir, tmp_path / "all", pipeline.boards_named("all"),
                                 options("all"))
    assert sorted(r.board.name for r in results) == sorted(b.name for b in list_boards())
    for r in results:
        assert (tmp_path / "all" / r.board.name / "manifest.json").is_file()
        assert r.bundle == tmp_path / "all" / r.board.name


def test_the_cache_is_used_when_nothing_changed_and_not_after_a_change(model_dir, boards,
                                                                      tmp_path, monkeypatch):
    calls = count_distillations(monkeypatch, model_dir)
    tight, tighter = boards["paths"]["tight"], boards["paths"]["tighter"]
    first = compile_dir(model_dir, tmp_path / "1", options(tight, distil=replace(QUICK, seed=3)))
    assert len(calls) == 1 and first.report["student"]["source"] == "distilled"
    assert any((model_dir / CACHE_DIR).glob("*.npz"))

    # nothing changed: read back, not distilled; the bundle's weights are the same bytes
    again = compile_dir(model_dir, tmp_path / "2", options(tight, distil=replace(QUICK, seed=3)))
    assert len(calls) == 1 and again.report["student"]["source"] == "cache"
    assert (tmp_path / "1" / "weights.npz").read_bytes() == (tmp_path / "2" / "weights.npz"
                                                             ).read_bytes()

    # the seed changed
    seeded = compile_dir(model_dir, tmp_path / "3", options(tight, distil=replace(QUICK, seed=4)))
    assert len(calls) == 2 and seeded.report["student"]["source"] == "distilled"

    # the plan changed (a board that holds a smaller rung)
    smaller = compile_dir(model_dir, tmp_path / "4", options(tighter, distil=replace(QUICK, seed=3)))
    assert len(calls) == 3 and smaller.report["student"]["source"] == "distilled"
    assert smaller.plan.parameters < first.plan.parameters


def test_a_changed_teacher_is_not_served_from_the_cache(model_dir, boards, tmp_path, monkeypatch):
    copy = tmp_path / "model"
    save_model(load_model(model_dir), copy)
    calls = count_distillations(monkeypatch, copy)
    tight = boards["paths"]["tight"]
    compile_dir(copy, tmp_path / "1", options(tight))
    compile_dir(copy, tmp_path / "2", options(tight))
    assert len(calls) == 1
    # retrained teacher: one weight of the encoder moves
    model = load_model(copy)
    with torch.no_grad():
        model.teacher.encoder.head.bias[0] += 1e-3
    save_model(model, copy)
    changed = compile_dir(copy, tmp_path / "3", options(tight))
    assert len(calls) == 2 and changed.report["student"]["source"] == "distilled"


def test_the_teacher_rung_is_the_teachers_own_weights(model_dir, boards, tmp_path, monkeypatch):
    calls = count_distillations(monkeypatch, model_dir)
    result = compile_dir(model_dir, tmp_path / "b", options(boards["paths"]["roomy"]))
    assert calls == [] and result.plan.teacher and result.report["student"]["source"] == "teacher"
    model = load_model(model_dir)
    x = model.windows_of(model.spans.calibration)
    teacher, _ = score_windows(model.teacher, x)
    bundle_id = hashlib.sha256((result.bundle / "manifest.json").read_bytes()).hexdigest()
    fp32 = dict(np.load(pipeline.student_file(model_dir, bundle_id), allow_pickle=False))
    # the gateway's numpy network on the recorded fp32 weights is the torch teacher (float
    # rounding apart)
    np.testing.assert_allclose(network_scores(fp32, x), teacher, rtol=1e-4, atol=1e-7)


# ---------------------------------------------------------------------------------------------
# threads


def blas_threads() -> set:
    """numpy's BLAS pool size(s), as threadpoolctl reports them."""
    return {pool["num_threads"] for pool in threadpoolctl.threadpool_info()
            if pool["user_api"] == "blas"}


def record_threads(monkeypatch, module, name, blas: list = None) -> list:
    seen = []
    real = getattr(module, name)

    def wrapped(*args, **kwargs):
        seen.append(torch.get_num_threads())
        if blas is not None:
            blas.append(blas_threads())
        return real(*args, **kwargs)

    monkeypatch.setattr(module, name, wrapped)
    return seen


@pytest.mark.parametrize("asked, expected", [(["--threads", "2"], 2), ([], 1)])
def test_train_honours_threads(tmp_path, monkeypatch, asked, expected):
    blas = []
    seen = record_threads(monkeypatch, pipeline, "train", blas)
    monkeypatch.setattr(threads, "free_cores", lambda: 2)
    before, blas_before = torch.get_num_threads(), blas_threads()
    csv = tmp_path / "d.csv"
    correlated_series(400).to_csv(csv, index=False)
    result = CliRunner().invoke(app, ["train", str(csv), "--out", str(tmp_path / "m"), "--window",
                                      "16", "--adversarial-epochs", "1", "--inversion-epochs", "1",
                                      "--quiet", *asked])
    assert result.exit_code == 0, result.output
    assert seen == [expected]
    # reference: threadpoolctl.threadpool_info (numpy's BLAS pool, limited for the run too)
    assert blas == [{expected}]
    assert torch.get_num_threads() == before and blas_threads() == blas_before


@pytest.mark.parametrize("asked, expected", [(["--threads", "2"], 2), ([], 1)])
def test_compile_honours_threads(model_dir, boards, tmp_path, monkeypatch, asked, expected):
    shutil.rmtree(model_dir / CACHE_DIR, ignore_errors=True)
    blas = []
    seen = record_threads(monkeypatch, distil_mod, "distil", blas)
    before, blas_before = torch.get_num_threads(), blas_threads()
    result = CliRunner().invoke(app, ["compile", str(model_dir), "--out", str(tmp_path / "b"),
                                      "--board", boards["paths"]["tight"], "--distil-epochs", "1",
                                      "--quiet", *asked])
    assert result.exit_code == 0, result.output
    assert seen == [expected]
    # reference: threadpoolctl.threadpool_info (numpy's BLAS pool, limited for the run too)
    assert blas == [{expected}]
    assert torch.get_num_threads() == before and blas_threads() == blas_before


def test_the_automatic_thread_count_never_exceeds_the_free_cores(monkeypatch):
    monkeypatch.setattr(threads, "AUTO_THREADS", 4)
    monkeypatch.setattr(threads.os, "cpu_count", lambda: 4)
    monkeypatch.setattr(threads.os, "getloadavg", lambda: (3.2, 3.0, 3.0))
    assert threads.choose_threads() == 1
    monkeypatch.setattr(threads.os, "getloadavg", lambda: (1.0, 1.0, 1.0))
    assert threads.choose_threads() == 3
    monkeypatch.setattr(threads.os, "getloadavg", lambda: (0.0, 0.0, 0.0))
    assert threads.choose_threads() == 4
    monkeypatch.setattr(threads.os, "getloadavg", lambda: (9.0, 9.0, 9.0))
    assert threads.choose_threads() == 1              # never fewer than one
    assert threads.choose_threads(3) == 3             # an explicit --threads is honoured


def test_plan_board_uses_the_data_period_and_the_teacher_shape(model_dir):
    model = load_model(model_dir)
    plan = plan_board(model, load_board("workstation"))
    assert plan.teacher and plan.hop_seconds_budget == pytest.approx(
        load_board("workstation").compute_fraction * plan.hop * model.period_s)


def test_a_fleet_asset_may_name_several_boards(tmp_path):
    from ganlet.compile import fleet

    (tmp_path / "f.toml").write_text(
        '[fleet]\nboard = ["a53-512", "workstation"]\n[[asset]]\nid = "a"\ndata = "a.csv"\n'
        '[[asset]]\nid = "b"\ndata = "b.csv"\nboard = "a72-2g"\n')
    spec = fleet.load_fleet(tmp_path / "f.toml")
    assert [a.board for a in spec.assets] == ["a53-512,workstation", "a72-2g"]
    (tmp_path / "bad.toml").write_text('[[asset]]\nid = "a"\ndata = "a.csv"\nboard = []\n')
    with pytest.raises(fleet.FleetError, match="board"):
        fleet.load_fleet(tmp_path / "bad.toml")
    assert Path(spec.assets[0].data).name == "a.csv"


def test_a_fleet_asset_compiled_for_two_boards_verifies_each_bundle(boards, tmp_path):
    from ganlet.compile import fleet

    correlated_series(900, seed=4).to_csv(tmp_path / "a.csv", index=False)
    tight = boards["paths"]["tight"]
    (tmp_path / "f.toml").write_text(
        f'[fleet]\nout = "out"\nboard = ["workstation", "{tight}"]\n'
        '[train]\nwindow = 16\nadversarial_epochs = 1\ninversion_epochs = 3\n'
        'encoder_hidden = [16]\ngenerator_hidden = [8, 16]\nmax_train_windows = 300\n'
        'train_until = 0.7\n[distil]\nepochs = 2\nmax_real_windows = 300\n'
        '[[asset]]\nid = "a"\ndata = "a.csv"\n')
    spec = fleet.load_fleet(tmp_path / "f.toml")
    result = fleet.run_asset(spec.assets[0], spec)
    assert result.status == "ok", result.reason
    assert set(result.boards) == {"workstation", "tight"}
    for board, check in result.boards.items():
        assert check["parity"] == "pass"
        assert (tmp_path / "out" / "a" / "bundle" / board / "manifest.json").is_file()
        assert (tmp_path / "out" / "a" / f"verify-{board}.json").is_file()
    assert result.boards["workstation"]["fidelity"]["network"] == "teacher"
    assert result.boards["tight"]["fidelity"]["network"] == "student"
    assert result.parity == "pass"
    assert result.bundle_kb == max(c["bundle_kb"] for c in result.boards.values())
