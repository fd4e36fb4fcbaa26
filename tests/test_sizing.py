"""Sizing a network to a board: the ladder runs from the teacher itself down to the smallest
student; every shipped board gets the largest rung inside each of its budgets, a bigger board
never a smaller network, a board that cannot hold the teacher the largest student that fits
(saying why), a board that cannot hold any student is refused with a message naming the
constraint and a size that would fit, and the architecture arithmetic matches torch's own
parameter count."""

from __future__ import annotations

import json
import re

import numpy as np
import pandas as pd
import pytest
from synthetic import correlated_series
from typer.testing import CliRunner

from ganlet.compile.boards import DEFAULT_BOARD, list_boards, load_board
from ganlet.compile.calibrate import K_MAX
from ganlet.compile.cli import app
from ganlet.compile.data import IntakeOptions, load_frame, split_spans
from ganlet.compile.layout import network_weights
from ganlet.compile.model import LSTMStack, TeacherConfig
from ganlet.compile.sizing import (
    BYTES_PER_PEAK,
    STUDENT_RUNGS,
    DoesNotFit,
    fits,
    ladder,
    network_counts,
    plan_for,
    size_student,
)
from ganlet.compile.train import save_model, train
from ganlet.runtime.lstm import Network
from ganlet.runtime.thresholds import calibrate_policy, pot_peaks_at_most

# A board that holds everything; tests shrink one budget at a time.
ROOMY = {
    "name": "tiny", "description": "test board", "cpu_class": "test-cpu",
    "mflops_single_core": 1000.0, "ram_budget_mb": 1024, "storage_budget_kb": 65536,
    "onnxruntime": False, "python": "3.9", "numpy": "1.19", "compute_fraction": 0.5,
}


def write_board(path, **changes):
    """A board TOML in the schema of DEVELOPERS.md "Board profiles"."""
    fields = {**ROOMY, **changes}
    lines = []
    for key, value in fields.items():
        if isinstance(value, bool):
            lines.append(f"{key} = {'true' if value else 'false'}")
        elif isinstance(value, str):
            lines.append(f'{key} = "{value}"')
        else:
            lines.append(f"{key} = {value!r}")
    path.write_text("\n".join(lines) + "\n")
    return path


# The default teacher's shape (TeacherConfig): the top rung of the ladder.
TEACHER = (TeacherConfig().encoder_hidden, TeacherConfig().generator_hidden)


def within_budgets(plan, board) -> bool:
    """The three budgets, written out here rather than calling sizing.fits."""
    return (plan.storage_bytes <= board.storage_budget_kb * 1024
            and plan.ram_bytes <= board.ram_budget_mb * 2**20
            and plan.hop_seconds_estimate <= plan.hop_seconds_budget)


@pytest.mark.parametrize("channels, latent, teacher", [
    (4, 2, TEACHER), (8, 4, TEACHER), (3, 2, ((16,), (8, 16))), (2, 2, ((200, 100), (100, 200)))])
def test_ladder_runs_from_the_teacher_itself_down_to_the_smallest_student(channels, latent,
                                                                          teacher):
    rungs = ladder(channels, latent, teacher)
    assert rungs[0] == (*teacher, True)
    assert all(not is_teacher for *_, is_teacher in rungs[1:])
    counts = [network_counts(channels, latent, enc, gen)[0] for enc, gen, _ in rungs]
    # strictly fewer parameters on every step down: no rung as big as the one above it
    assert all(a > b for a, b in zip(counts, counts[1:])), counts
    # every student rung smaller than the teacher is on the ladder, down to the smallest
    smaller = [r for r in STUDENT_RUNGS if network_counts(channels, latent, *r)[0] < counts[0]]
    assert {(e, g) for e, g, _ in rungs[1:]} == set(smaller)
    if smaller:
        assert rungs[-1][:2] == STUDENT_RUNGS[-1]


@pytest.mark.parametrize("channels, window", [(3, 16), (3, 32), (8, 64)])
@pytest.mark.parametrize("period", [1.0, 10.0])
def test_plan_respects_every_budget_of_every_shipped_board(channels, window, period):
    boards = list_boards()
    assert {b.name for b in boards} >= {"a53-512", "a72-2g", "x86-lowpower", "workstation"}
    latent = max(2, channels // 2)
    for board in boards:
        plan = size_student(board, channels, latent, window, period, TEACHER)
        assert plan.board == board.name
        assert plan.storage_bytes <= board.storage_budget_kb * 1024
        assert plan.ram_bytes <= board.ram_budget_mb * 2**20
        assert plan.hop_seconds_estimate <= plan.hop_seconds_budget
        # the budget per hop is the board's share of the hop's sample periods
        assert plan.hop_seconds_budget == pytest.approx(board.compute_fraction * plan.hop * period)
        # the time estimate is the FLOPs at the board's MFLOP/s
        assert plan.hop_seconds_estimate == pytest.approx(
            plan.flops_per_hop / (board.mflops_single_core * 1e6))
        # the largest rung that fits: every larger rung fails at every allowed hop
        rungs = ladder(channels, latent, TEACHER)
        rung = [r[:2] for r in rungs].index((plan.encoder_hidden, plan.generator_hidden))
        assert plan.teacher == (rung == 0)
        assert bool(plan.teacher_refused) == (rung > 0)
        for enc, gen, _ in rungs[:rung]:
            for hop in range(1, max(1, window // 4) + 1):
                assert not within_budgets(plan_for(board, channels, latent, enc, gen, window,
                                                   hop, period), board)
        # and the smallest hop at which this rung fits
        for hop in range(1, plan.hop):
            assert not within_budgets(plan_for(board, channels, latent, plan.encoder_hidden,
                                               plan.generator_hidden, window, hop, period), board)


@pytest.mark.parametrize("channels, window, period", [(4, 32, 60.0), (8, 64, 1.0), (3, 16, 0.1),
                                                      (12, 32, 1.0)])
def test_a_bigger_board_never_gets_a_smaller_network(channels, window, period):
    # the shipped boards grow in every budget from a53-512 to workstation (boards/*.toml)
    order = ["a53-512", "a72-2g", "x86-lowpower", "workstation"]
    latent = max(2, channels // 2)
    sizes = []
    for name in order:
        try:
            sizes.append(size_student(load_board(name), channels, latent, window, period,
                                      TEACHER).parameters)
        except DoesNotFit:
            sizes.append(0)
    assert sizes == sorted(sizes), dict(zip(order, sizes))


def test_a_board_that_cannot_hold_the_teacher_gets_the_largest_student_that_fits(tmp_path):
    teacher = plan_for(load_board(write_board(tmp_path / "r.toml")), 4, 2, *TEACHER, 32, 1, 60.0)
    # flash for everything but the teacher itself: 1 KB less than its estimate
    kb = int(teacher.storage_bytes // 1024) - 1
    board = load_board(write_board(tmp_path / "t.toml", storage_budget_kb=kb))
    plan = size_student(board, 4, 2, 32, 60.0, TEACHER)
    assert not plan.teacher
    assert plan.storage_bytes <= kb * 1024 < teacher.storage_bytes
    assert plan.parameters < teacher.parameters
    # the next rung up (the teacher) is what does not fit, and the plan says why
    assert (plan.encoder_hidden, plan.generator_hidden) == ladder(4, 2, TEACHER)[1][:2]
    assert len(plan.teacher_refused) == 1 and plan.teacher_refused[0].startswith("storage")
    assert f"allows {kb} KB" in plan.teacher_refused[0]
    assert "cannot hold the teacher itself" in plan.describe()
    assert fits(plan, board) and within_budgets(plan, board)


@pytest.mark.parametrize("channels, latent, enc, gen", [
    (3, 2, (32,), (16, 32)), (5, 2, (8,), (6, 8)), (1, 3, (4, 7), (5,)), (8, 4, (12, 6, 9), (3,))])
def test_counts_match_torch_parameters_and_numpy_flops(channels, latent, enc, gen):
    encoder = LSTMStack(channels, enc, latent)
    generator = LSTMStack(latent, gen, channels)
    params, rows, biases, macs = network_counts(channels, latent, enc, gen)
    tensors = list(encoder.parameters()) + list(generator.parameters())
    # reference: torch.nn.Module.parameters (the real parameter count of the modules)
    assert params == sum(p.numel() for p in tensors)
    # reference: torch's tensor shapes: matrices are 2-D (one scale per row), biases 1-D
    assert rows == sum(p.shape[0] for p in tensors if p.dim() == 2)
    assert biases == sum(p.numel() for p in tensors if p.dim() == 1)
    # one multiply-add per matrix entry per time step
    assert macs == sum(p.numel() for p in tensors if p.dim() == 2)
    window = 24
    net = Network(network_weights(encoder.layers, encoder.head, generator.layers, generator.head))
    board = load_board("a53-512")
    plan = plan_for(board, channels, latent, enc, gen, window, 1, 10.0)
    assert plan.parameters == params
    assert plan.flops_per_hop == net.flops_per_window(window) == 2 * macs * window


def test_ram_estimate_counts_onnxruntime_only_where_present(tmp_path):
    without = load_board(write_board(tmp_path / "a.toml", onnxruntime=False))
    with_ort = load_board(write_board(tmp_path / "b.toml", onnxruntime=True))
    a = plan_for(without, 3, 2, (8,), (6, 8), 32, 1, 10.0)
    b = plan_for(with_ort, 3, 2, (8,), (6, 8), 32, 1, 10.0)
    assert b.ram_bytes > a.ram_bytes


def _need(message: str, pattern: str) -> float:
    found = re.search(pattern, message)
    assert found, message
    return float(found.group(1))


def test_tiny_storage_is_refused_naming_storage_and_a_size_that_fits(tmp_path):
    board = load_board(write_board(tmp_path / "tiny.toml", storage_budget_kb=4))
    with pytest.raises(DoesNotFit) as err:
        size_student(board, 3, 2, 32, 10.0, TEACHER)
    msg = str(err.value)
    assert "storage" in msg and "allows 4 KB" in msg
    assert "RAM" not in msg and "compute" not in msg
    need_kb = _need(msg, r"needs (\d+) KB")
    # the named size does fit, with the smallest student
    roomier = load_board(write_board(tmp_path / "t2.toml", storage_budget_kb=int(need_kb)))
    plan = size_student(roomier, 3, 2, 32, 10.0, TEACHER)
    assert (plan.encoder_hidden, plan.generator_hidden) == STUDENT_RUNGS[-1]
    # one KB less does not
    with pytest.raises(DoesNotFit, match="storage"):
        size_student(load_board(write_board(tmp_path / "t3.toml",
                                            storage_budget_kb=int(need_kb) - 1)), 3, 2, 32, 10.0,
                     TEACHER)


def test_tiny_ram_is_refused_naming_ram_and_a_size_that_fits(tmp_path):
    board = load_board(write_board(tmp_path / "tiny.toml", ram_budget_mb=8))
    with pytest.raises(DoesNotFit) as err:
        size_student(board, 3, 2, 32, 10.0, TEACHER)
    msg = str(err.value)
    assert "RAM" in msg and "allows 8 MB" in msg
    assert "storage" not in msg and "compute" not in msg
    need_mb = _need(msg, r"needs (\d+) MB")
    plan = size_student(load_board(write_board(tmp_path / "t2.toml", ram_budget_mb=int(need_mb))),
                        3, 2, 32, 10.0, TEACHER)
    assert plan.ram_bytes <= need_mb * 2**20


def test_tiny_compute_is_refused_naming_compute_and_the_mflops_that_fit(tmp_path):
    board = load_board(write_board(tmp_path / "tiny.toml", mflops_single_core=1e-5))
    with pytest.raises(DoesNotFit) as err:
        size_student(board, 3, 2, 32, 10.0, TEACHER)
    msg = str(err.value)
    assert "compute" in msg and "MFLOP/s" in msg
    assert "storage" not in msg and "RAM" not in msg
    need = _need(msg, r"need ([\d.]+) MFLOP/s")
    assert need > 1e-5
    plan = size_student(load_board(write_board(tmp_path / "t2.toml", mflops_single_core=need)),
                        3, 2, 32, 10.0, TEACHER)
    assert plan.hop == 32 // 4      # only the longest allowed hop fits at that speed
    assert plan.hop_seconds_estimate <= plan.hop_seconds_budget


def test_several_problems_are_all_named(tmp_path):
    board = load_board(write_board(tmp_path / "tiny.toml", storage_budget_kb=4, ram_budget_mb=8,
                                   mflops_single_core=1e-5))
    with pytest.raises(DoesNotFit) as err:
        size_student(board, 3, 2, 32, 10.0, TEACHER)
    assert all(word in str(err.value) for word in ("storage", "RAM", "compute"))


@pytest.fixture(scope="module")
def untrained_model_dir(tmp_path_factory):
    """A model dir whose teacher saw no epochs: sizing happens before anything is distilled."""
    root = tmp_path_factory.mktemp("sizing")
    csv = root / "data.csv"
    correlated_series(400).to_csv(csv, index=False)
    frame = load_frame(csv, IntakeOptions())
    cfg = TeacherConfig(window=16, adversarial_epochs=0, inversion_epochs=0,
                         encoder_hidden=(8,), generator_hidden=(8,), discriminator_hidden=4)
    return save_model(train(frame, split_spans(frame, None, 0.2), cfg), root / "model")


def test_cli_refuses_a_board_that_cannot_hold_the_model(untrained_model_dir, tmp_path,
                                                         monkeypatch):
    monkeypatch.chdir(tmp_path)
    write_board(tmp_path / "tiny.toml", storage_budget_kb=4)
    # in process (click's CliRunner keeps stdout and stderr apart): `ganlet compile MODEL
    # --board tiny.toml --out X`
    result = CliRunner().invoke(app, ["compile", str(untrained_model_dir), "--board", "tiny.toml",
                                      "--out", "X"])
    assert result.exit_code == 2, result.output
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: "), result.stderr
    assert "storage" in lines[0] and re.search(r"needs \d+ KB", lines[0])
    assert result.stdout == ""
    assert not (tmp_path / "X").exists()


def test_cli_budgets_lists_every_shipped_board_and_the_default():
    result = CliRunner().invoke(app, ["budgets"])
    assert result.exit_code == 0, result.output
    for board in list_boards():
        assert board.name in result.output
    assert f"{DEFAULT_BOARD} (default)" in result.output
    # the default is the smallest board: a bundle that fits there fits everywhere
    smallest = min(list_boards(), key=lambda b: (b.storage_budget_kb, b.ram_budget_mb))
    assert smallest.name == DEFAULT_BOARD



@pytest.mark.parametrize("n", [20, 21, 57, 400, 499, 500, 501, 6017, 49_999, 60_000])
def test_the_peak_bound_holds_for_what_pot_calibration_keeps(n):
    """pot_peaks_at_most bounds the peaks calibrate_policy("pot") writes into the manifest,
    for any score distribution with ties or without (t from numpy.quantile's interpolation)."""
    rng = np.random.default_rng(n)
    for scores in (rng.exponential(size=n), np.round(rng.exponential(size=n), 1),
                   np.sort(rng.normal(size=n))):
        kept = len(calibrate_policy("pot", scores)["peaks"])
        assert kept <= pot_peaks_at_most(n)
    assert pot_peaks_at_most(n) <= 1000


def test_the_threshold_share_of_flash_follows_the_training_history(tmp_path):
    """A short history calibrates few peaks; no history counts the most a policy keeps."""
    board = load_board(write_board(tmp_path / "r.toml"))
    unknown = plan_for(board, 4, 2, *TEACHER, 32, 1, 60.0)
    short = plan_for(board, 4, 2, *TEACHER, 32, 1, 60.0, history_rows=400)
    hop4 = plan_for(board, 4, 2, *TEACHER, 32, 4, 60.0, history_rows=20_000)
    assert unknown.storage_bytes - short.storage_bytes == BYTES_PER_PEAK * (1000 - 10)
    assert unknown.storage_bytes - hop4.storage_bytes == BYTES_PER_PEAK * (1000 - 100)


def regime_series(n: int, channels: int, seed: int = 0) -> pd.DataFrame:
    """Many channels driven by one duty that steps between four held states (60 rows each),
    so calibration finds the most operating regimes it keeps, and noise on top."""
    rng = np.random.default_rng(seed)
    duty = np.repeat([0.0, 1.0, 2.0, 3.0], 60)[np.arange(n) % 240]
    gains = rng.uniform(0.5, 2.0, channels)
    values = 10 + np.outer(duty, gains) + 0.05 * rng.standard_normal((n, channels))
    frame = pd.DataFrame(values, columns=[f"sensor_{c:02d}" for c in range(channels)])
    frame.insert(0, "time", pd.date_range("2026-01-05", periods=n, freq="60s"))
    return frame


def test_a_wide_bundle_with_the_most_regimes_packs_within_its_flash_estimate(tmp_path):
    """48 channels and four operating regimes: the manifest's per-channel numbers dominate.
    The estimate had assumed 200 bytes a channel (516 measured), so a 48-channel model the
    sizing said fitted the default board was refused by the packer after its distillation."""
    csv = tmp_path / "wide.csv"
    regime_series(1500, 48).to_csv(csv, index=False)
    frame = load_frame(csv, IntakeOptions())
    cfg = TeacherConfig(window=16, adversarial_epochs=1, inversion_epochs=2,
                        encoder_hidden=(16,), generator_hidden=(8, 16), discriminator_hidden=8)
    model_dir = save_model(train(frame, split_spans(frame, None, 0.2), cfg), tmp_path / "model")
    result = CliRunner().invoke(app, ["compile", str(model_dir), "--out", str(tmp_path / "B")])
    assert result.exit_code == 0, result.output
    manifest = json.loads((tmp_path / "B" / "manifest.json").read_text())
    assert len(manifest["score"]["regimes"]["centres"]) == K_MAX  # the worst case per channel
    core = sum(p.stat().st_size for p in (tmp_path / "B").iterdir() if p.is_file())
    assert core <= manifest["board"]["estimate"]["storage_kb"] * 1024
