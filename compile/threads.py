"""How many threads torch gets for ganlet's networks (training and compiling).

Rule: one thread unless the user asks for more with --threads. The teacher and its students are
tiny LSTMs (tens of thousands of parameters, batches of 64-128 windows of ~32 steps): each
operation is too small to split well, and a thread that waits for a busy core stalls the others
(issue 14 measured a distillation 6x slower with two threads than with one at load 5-6 on
2 cores). On the demo model (`benchmarks/bench_boards.py`, DEVELOPERS.md "Threads") two threads
saved 14-23 % of the wall time on an otherwise idle 2-core machine and cost 3-16x as soon as
another process wanted a core; one thread is the better bet everywhere but on a machine known to
be free. The automatic choice never exceeds the cores not already busy (os.getloadavg), so
raising AUTO_THREADS cannot oversubscribe a loaded machine; an explicit --threads N is honoured
as given. numpy's BLAS pool (OpenBLAS starts one thread per core) gets the same count for the
block, through threadpoolctl (installed with scikit-learn): the calibration and fidelity stages
score windows with numpy, and a BLAS thread waiting for a busy core stalls them the same way.
"""

from __future__ import annotations

import os
from contextlib import contextmanager, nullcontext
from typing import Iterator, Optional

AUTO_THREADS = 1


def free_cores() -> int:
    """Cores not already busy: the core count minus the 1-minute load average, at least 1."""
    cores = os.cpu_count() or 1
    try:
        busy = os.getloadavg()[0]
    except (AttributeError, OSError):   # no load average on this platform
        busy = 0.0
    return max(1, cores - int(round(busy)))


def choose_threads(requested: Optional[int] = None) -> int:
    """--threads N as given; otherwise the rule above, capped by the free cores."""
    if requested is not None:
        if requested < 1:
            raise ValueError(f"--threads {requested}: give 1 or more")
        return int(requested)
    return max(1, min(AUTO_THREADS, free_cores()))


@contextmanager
def torch_threads(requested: Optional[int] = None) -> Iterator[int]:
    """Run a block with torch's intra-op thread count chosen here; restore it afterwards."""
    import torch

    before = torch.get_num_threads()
    chosen = choose_threads(requested)
    torch.set_num_threads(chosen)
    try:
        with blas_threads(chosen):
            yield chosen
    finally:
        torch.set_num_threads(before)


def blas_threads(count: int):
    """numpy's BLAS thread pool limited to `count` for a block (nothing without threadpoolctl)."""
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:
        return nullcontext()
    return threadpool_limits(limits=count, user_api="blas")
