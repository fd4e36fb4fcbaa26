"""Choose the student network for a board: weights fit flash, working set fits RAM, and one
window's forward pass fits the share of the sample period the board allows per hop.

The estimates are arithmetic on the architecture (parameter counts, FLOPs per window); the
bench on the gateway measures the real figures and can replace a board's MFLOP/s estimate.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

from ganlet.compile.boards import Board

# Students from largest to smallest: (encoder widths, generator widths), widths grow to output.
LADDER = (
    ((32,), (16, 32)),
    ((24,), (12, 24)),
    ((16,), (12, 16)),
    ((12,), (8, 12)),
    ((8,), (6, 8)),
    ((6,), (4, 6)),
)
# What a CPython + numpy process takes before the detector allocates anything (from memory:
# ~20-25 MB RSS on a 64-bit Linux for `python3 -c "import numpy"`; onnxruntime adds ~15-30 MB).
PYTHON_NUMPY_BASE_MB = 24.0
ONNXRUNTIME_EXTRA_MB = 30.0
# Bytes on flash beyond the raw weights, estimated generously (an upper bound; the packer
# checks the real figure after packing). Fixed part: manifest without the threshold's peaks
# (~5 KB, its file list names every runtime file), INSTALL.txt with the unit (~5 KB), the unit
# file (~1.3 KB), run.py (~15 KB: it carries a copy of runtime/trust.py, the checks that run
# before any bundle code), the signatures, the ONNX graph's fixed nodes.
PACKING_OVERHEAD_BYTES = 30_000
# Per stored array (measured on packed bundles: ~260 bytes of npy header + zip entries in
# weights.npz, ~120 bytes of initializer + node records in model.onnx).
PER_ARRAY_BYTES = 400
# Per channel: its name, unit, scaler centre and scale in the manifest and INSTALL.txt.
PER_CHANNEL_BYTES = 200
# The POT threshold carries up to max_peaks = 1000 calibration peaks (runtime/thresholds.py
# default) as indented JSON lines of at most ~32 bytes each.
THRESHOLD_PEAKS_BYTES = 1000 * 32


class DoesNotFit(ValueError):
    """No student fits the board; the message names the constraint and what would fit."""


@dataclass
class StudentPlan:
    encoder_hidden: tuple
    generator_hidden: tuple
    latent: int
    window: int
    hop: int
    parameters: int
    weights_bytes: int          # int8 matrices + float32 row scales + float32 biases
    storage_bytes: int          # model.onnx + weights.npz + manifest, estimated
    ram_bytes: int
    flops_per_hop: int
    hop_seconds_estimate: float
    hop_seconds_budget: float
    board: str

    def to_json(self) -> dict:
        d = asdict(self)
        d["encoder_hidden"] = list(self.encoder_hidden)
        d["generator_hidden"] = list(self.generator_hidden)
        return d

    def describe(self) -> str:
        return (f"student enc {list(self.encoder_hidden)} latent {self.latent} gen "
                f"{list(self.generator_hidden)}, window {self.window}, hop {self.hop}: "
                f"{self.parameters} parameters, {self.flops_per_hop / 1e3:.1f} kFLOP per hop "
                f"(~{self.hop_seconds_estimate * 1e3:.2f} ms of {self.hop_seconds_budget * 1e3:.0f} ms "
                f"allowed), weights {self.weights_bytes / 1024:.1f} KiB, bundle ~"
                f"{self.storage_bytes / 1024:.1f} KiB, RAM ~{self.ram_bytes / 2**20:.1f} MiB "
                f"on {self.board}")


def lstm_stack_shapes(n_in: int, hidden: tuple, n_out: int):
    """(input width, hidden width) per LSTM layer and the head's (in, out)."""
    widths = [n_in, *hidden]
    return [(widths[k], widths[k + 1]) for k in range(len(hidden))], (widths[-1], n_out)


def network_counts(n_channels: int, latent: int, enc: tuple, gen: tuple):
    """(parameters, matrix rows (one int8 scale each), biases, multiply-adds per time step)."""
    params = rows = biases = macs = 0
    for n_in, hidden, n_out in ((n_channels, enc, latent), (latent, gen, n_channels)):
        layers, (h_in, h_out) = lstm_stack_shapes(n_in, hidden, n_out)
        for i, h in layers:
            params += 4 * h * (i + h) + 8 * h
            rows += 2 * 4 * h              # W and R each have 4H rows
            biases += 8 * h
            macs += 4 * h * (i + h)
        params += h_in * h_out + h_out
        rows += h_out
        biases += h_out
        macs += h_in * h_out
    return params, rows, biases, macs


def plan_for(board: Board, n_channels: int, latent: int, enc: tuple, gen: tuple,
             window: int, hop: int, period_s: float) -> StudentPlan:
    params, rows, biases, macs = network_counts(n_channels, latent, enc, gen)
    matrix_params = params - biases
    weights_bytes = matrix_params + 4 * rows + 4 * biases
    # model.onnx carries the same int8 arrays as weights.npz, so the weights count twice.
    # Arrays: W, R, B, W.scale, R.scale per LSTM layer; W, b, W.scale per head.
    arrays = 5 * (len(enc) + len(gen)) + 2 * 3
    storage = (2 * weights_bytes + PACKING_OVERHEAD_BYTES + PER_ARRAY_BYTES * arrays
               + PER_CHANNEL_BYTES * n_channels + THRESHOLD_PEAKS_BYTES)
    widest = max((*enc, *gen, n_channels, latent))
    # float32 dequantised weights + per-step gate activations of one window + ring buffer
    activations = 4 * window * (4 * widest + 2 * widest + 2 * n_channels) * 2
    ram = int((PYTHON_NUMPY_BASE_MB + (ONNXRUNTIME_EXTRA_MB if board.onnxruntime else 0)) * 2**20
              + 4 * params + activations)
    flops = 2 * macs * window
    seconds = flops / (board.mflops_single_core * 1e6)
    budget = board.compute_fraction * hop * period_s
    return StudentPlan(enc, gen, latent, window, hop, params, weights_bytes, storage, ram, flops,
                       seconds, budget, board.name)


def size_student(board: Board, n_channels: int, latent: int, window: int,
                 period_s: float, max_hop: int | None = None) -> StudentPlan:
    """The largest student on the ladder that fits, at the smallest hop that fits compute."""
    max_hop = max_hop or max(1, window // 4)
    storage_limit = board.storage_budget_kb * 1024
    ram_limit = board.ram_budget_mb * 2**20
    tried = []
    for enc, gen in LADDER:
        for hop in range(1, max_hop + 1):
            plan = plan_for(board, n_channels, latent, enc, gen, window, hop, period_s)
            tried.append(plan)
            if (plan.storage_bytes <= storage_limit and plan.ram_bytes <= ram_limit
                    and plan.hop_seconds_estimate <= plan.hop_seconds_budget):
                return plan
    smallest = min(tried, key=lambda p: (p.storage_bytes, -p.hop))
    problems = []
    # Needs are rounded up, so a budget of the stated size does fit (rounding to nearest could
    # name a figure just below what is needed).
    if smallest.storage_bytes > storage_limit:
        problems.append(f"storage: the smallest student needs {math.ceil(smallest.storage_bytes / 1024)} "
                        f"KB of flash, the board allows {board.storage_budget_kb} KB")
    if smallest.ram_bytes > ram_limit:
        problems.append(f"RAM: the smallest student needs {math.ceil(smallest.ram_bytes / 2**20)} MB, "
                        f"the board allows {board.ram_budget_mb} MB")
    if smallest.hop_seconds_estimate > smallest.hop_seconds_budget:
        need = smallest.flops_per_hop / (board.compute_fraction * max_hop * period_s) / 1e6
        step = 10.0 ** (math.floor(math.log10(need)) - 2)   # round up to 3 significant digits
        need_text = f"{math.ceil(need / step) * step:.3g}"
        problems.append(f"compute: one window takes ~{smallest.hop_seconds_estimate * 1e3:.1f} ms "
                        f"but the board allows {smallest.hop_seconds_budget * 1e3:.1f} ms per hop "
                        f"at hop {max_hop}; it would need {need_text} MFLOP/s "
                        "or a longer period")
    raise DoesNotFit(f"nothing fits board {board.name!r}: " + "; ".join(problems)
                     + f" (smallest student: enc {list(smallest.encoder_hidden)}, gen "
                       f"{list(smallest.generator_hidden)}, window {window})")
