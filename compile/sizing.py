"""Choose the network a board runs: weights fit flash, working set fits RAM, and one window's
forward pass fits the share of the data's sample period the board allows per hop.

The ladder runs from the teacher itself (its own encoder and generator, quantised: nothing to
distil, the closest copy there is) down to the smallest useful student, so a board buys as much
fidelity as its budgets hold and a bigger board never gets less than a smaller one. The
estimates are arithmetic on the architecture (parameter counts, FLOPs per window); the bench on
the gateway measures the real figures and can replace a board's MFLOP/s estimate.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field

from ganlet.compile.boards import Board
from ganlet.compile.calibrate import K_MAX
from ganlet.runtime.thresholds import pot_peaks_at_most

# Students below the teacher, largest first: (encoder widths, generator widths), widths grow
# towards the output. A rung is used only when it has fewer parameters than the teacher (a
# student as big as its teacher buys nothing the teacher itself does not give).
STUDENT_RUNGS = (
    ((96,), (48, 96)),
    ((64,), (32, 64)),
    ((48,), (24, 48)),
    ((40,), (20, 40)),
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
# checks the real figure after packing). Fixed part, measured on a packed 48-channel bundle:
# run.py 15.2 KB (it carries a copy of runtime/trust.py, the checks that run before any bundle
# code), the manifest without its per-channel numbers and the threshold's peaks 6.3 KB (its
# file list names every runtime file), INSTALL.txt 3.9 KB, the unit file 0.8 KB: 26.2 KB, and
# a fifth more for what grows with the code.
PACKING_OVERHEAD_BYTES = 32_000
# Per stored array (measured on packed bundles: ~260 bytes of npy header + zip entries in
# weights.npz, ~120 bytes of initializer + node records in model.onnx).
PER_ARRAY_BYTES = 400
# Per channel, in the manifest: its name, unit and feature, and one number per section that
# holds one for every channel (scaler centre and scale, drift lo / hi / v_max, the held-reading
# limit) plus a centre and a normal-error scale per operating regime, at the most regimes
# calibrate keeps. A number in the manifest's indented JSON takes ~29 bytes (17 significant
# digits, sign, the nesting's indent). Measured on a 48-channel bundle with 4 regimes: 461
# bytes a channel (200 had been assumed, and a 48-channel model the estimate said fitted the
# default board was refused by the packer after its distillation).
NUMBERS_PER_CHANNEL = 6 + 2 * K_MAX
BYTES_PER_NUMBER = 32
PER_CHANNEL_BYTES = 80 + NUMBERS_PER_CHANNEL * BYTES_PER_NUMBER
# The POT threshold carries its calibration peaks (runtime/thresholds.pot_peaks_at_most of the
# training hops, 1000 at most) as indented JSON lines of at most ~32 bytes each.
BYTES_PER_PEAK = 32


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
    teacher: bool = False       # the teacher's own networks, quantised (nothing to distil)
    # why the teacher itself does not fit the board (empty when it does): the price of a
    # smaller board, named constraint by constraint
    teacher_refused: list = field(default_factory=list)

    def to_json(self) -> dict:
        d = asdict(self)
        d["encoder_hidden"] = list(self.encoder_hidden)
        d["generator_hidden"] = list(self.generator_hidden)
        return d

    def network_text(self) -> str:
        what = "the teacher itself" if self.teacher else "student"
        return (f"{what}: enc {list(self.encoder_hidden)} latent {self.latent} gen "
                f"{list(self.generator_hidden)}, {self.parameters} parameters")

    def describe(self) -> str:
        text = (f"{self.network_text()}, window {self.window}, hop {self.hop}: "
                f"{self.flops_per_hop / 1e3:.1f} kFLOP per hop "
                f"(~{self.hop_seconds_estimate * 1e3:.2f} ms of {self.hop_seconds_budget * 1e3:.0f} ms "
                f"allowed), weights {self.weights_bytes / 1024:.1f} KiB, bundle ~"
                f"{self.storage_bytes / 1024:.1f} KiB, RAM ~{self.ram_bytes / 2**20:.1f} MiB "
                f"on {self.board}")
        if self.teacher_refused:
            text += (f"; {self.board} cannot hold the teacher itself ("
                     + "; ".join(self.teacher_refused) + ")")
        return text


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


def threshold_bytes(history_rows: int | None, hop: int) -> int:
    """The POT peaks' share of the manifest: the training rows give one score a hop (no
    history given: the most a policy keeps)."""
    hops = None if history_rows is None else math.ceil(history_rows / hop)
    return BYTES_PER_PEAK * pot_peaks_at_most(hops)


def plan_for(board: Board, n_channels: int, latent: int, enc: tuple, gen: tuple,
             window: int, hop: int, period_s: float,
             history_rows: int | None = None) -> StudentPlan:
    params, rows, biases, macs = network_counts(n_channels, latent, enc, gen)
    matrix_params = params - biases
    weights_bytes = matrix_params + 4 * rows + 4 * biases
    # model.onnx carries the same int8 arrays as weights.npz, so the weights count twice.
    # Arrays: W, R, B, W.scale, R.scale per LSTM layer; W, b, W.scale per head.
    arrays = 5 * (len(enc) + len(gen)) + 2 * 3
    storage = (2 * weights_bytes + PACKING_OVERHEAD_BYTES + PER_ARRAY_BYTES * arrays
               + PER_CHANNEL_BYTES * n_channels + threshold_bytes(history_rows, hop))
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


def ladder(n_channels: int, latent: int, teacher: tuple) -> list:
    """(encoder widths, generator widths, is_teacher) from the teacher itself down to the
    smallest student, every rung with fewer parameters than the one above."""
    t_enc, t_gen = (tuple(int(h) for h in widths) for widths in teacher)
    top = network_counts(n_channels, latent, t_enc, t_gen)[0]
    below = [(enc, gen) for enc, gen in STUDENT_RUNGS
             if network_counts(n_channels, latent, enc, gen)[0] < top]
    below.sort(key=lambda r: -network_counts(n_channels, latent, *r)[0])
    return [(t_enc, t_gen, True)] + [(enc, gen, False) for enc, gen in below]


def fits(plan: StudentPlan, board: Board) -> bool:
    return (plan.storage_bytes <= board.storage_budget_kb * 1024
            and plan.ram_bytes <= board.ram_budget_mb * 2**20
            and plan.hop_seconds_estimate <= plan.hop_seconds_budget)


def size_student(board: Board, n_channels: int, latent: int, window: int, period_s: float,
                 teacher: tuple, max_hop: int | None = None,
                 history_rows: int | None = None) -> StudentPlan:
    """The largest rung of the ladder that fits, at the smallest hop that fits compute.
    teacher = (encoder widths, generator widths) of the teacher: the top rung; history_rows =
    the training rows the threshold is calibrated on (None: the largest threshold there is)."""
    max_hop = max_hop or max(1, window // 4)
    rungs = ladder(n_channels, latent, teacher)
    for enc, gen, is_teacher in rungs:
        for hop in range(1, max_hop + 1):
            plan = plan_for(board, n_channels, latent, enc, gen, window, hop, period_s,
                            history_rows)
            if fits(plan, board):
                plan.teacher = is_teacher
                if not is_teacher:
                    plan.teacher_refused = problems(board, n_channels, latent, rungs[0][:2],
                                                    window, max_hop, period_s, "the teacher",
                                                    history_rows)
                return plan
    smallest = rungs[-1][:2]
    raise DoesNotFit(f"nothing fits board {board.name!r}: "
                     + "; ".join(problems(board, n_channels, latent, smallest, window, max_hop,
                                          period_s, "the smallest student", history_rows))
                     + f" (smallest student: enc {list(smallest[0])}, gen {list(smallest[1])}, "
                       f"window {window})")


def problems(board: Board, n_channels: int, latent: int, rung: tuple, window: int,
             max_hop: int, period_s: float, who: str, history_rows: int | None = None) -> list:
    """Each budget a rung breaks even at its longest hop, with the figure that would fit.
    Needs are rounded up, so a budget of the stated size does fit (rounding to nearest could
    name a figure just below what is needed)."""
    plan = plan_for(board, n_channels, latent, *rung, window, max_hop, period_s, history_rows)
    found = []
    if plan.storage_bytes > board.storage_budget_kb * 1024:
        found.append(f"storage: {who} needs {math.ceil(plan.storage_bytes / 1024)} KB of "
                     f"flash, the board allows {board.storage_budget_kb} KB")
    if plan.ram_bytes > board.ram_budget_mb * 2**20:
        found.append(f"RAM: {who} needs {math.ceil(plan.ram_bytes / 2**20)} MB, the board "
                     f"allows {board.ram_budget_mb} MB")
    if plan.hop_seconds_estimate > plan.hop_seconds_budget:
        need = plan.flops_per_hop / (board.compute_fraction * max_hop * period_s) / 1e6
        step = 10.0 ** (math.floor(math.log10(need)) - 2)   # round up to 3 significant digits
        found.append(f"compute: one window of {who} takes "
                     f"~{plan.hop_seconds_estimate * 1e3:.1f} ms but the board allows {plan.hop_seconds_budget * 1e3:.1f} ms per hop at hop "
                     f"{max_hop}; it would need {math.ceil(need / step) * step:.3g} MFLOP/s "
                     "or a longer period")
    return found
