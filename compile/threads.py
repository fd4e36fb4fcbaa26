"""How many threads torch gets for ganlet's networks (training and compiling).

Rule: one thread unless the user asks for more with --threads. The teacher and its students are
tiny LSTMs (tens of thousands of parameters, batches of 64-128 windows of ~32 steps): each
operation is too small to split across threads, so a second thread mostly waits on the first,
and on a machine whose cores are already busy the waiting multiplies (issue 14 measured a
distillation 6x slower with two threads than with one at load 5-6 on 2 cores). The ratio of 2
threads to 1 on the demo model, measured by `benchmarks/bench_boards.py`, is in DEVELOPERS.md
("Threads"). The rule never asks for more threads than there are cores not already busy
(os.getloadavg), so raising AUTO_THREADS cannot oversubscribe a loaded machine; an explicit
--threads N is honoured as given.
"""

from __future__ import annotations

import os
from contextlib import contextmanager
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
        yield chosen
    finally:
        torch.set_num_threads(before)
