"""Running `run.py stream` in-process or as a subprocess, for the gateway input tests."""

import contextlib
import io
import json
import subprocess
import sys
from pathlib import Path
from typing import List, Optional, Sequence

import numpy as np
import runtime_fixtures as fx

from ganlet.runtime.cli import main
from ganlet.runtime.intake import format_time


class Run:
    def __init__(self, code: int, out: str, err: str):
        self.code = code
        self.events = [json.loads(line) for line in out.splitlines() if line.strip()]
        self.err = err

    def of(self, name: str) -> List[dict]:
        return [e for e in self.events if e["event"] == name]

    @property
    def stop(self) -> dict:
        return self.of("stop")[-1]

    @property
    def scores(self) -> List[float]:
        return [e["score"] for e in self.of("score")]

    @property
    def score_times(self) -> List[str]:
        return [e["time"] for e in self.of("score")]

    def accounted(self) -> int:
        """Lines the stop event accounts for: samples, refusals, blanks, headers, held rows."""
        c = self.stop["counters"]
        return (c["samples"] + sum(self.stop["errors"].values()) + c["blank_lines"]
                + c.get("header_lines", 0) + self.stop.get("held_rows", 0))


def stream(bundle_dir, csv_path, *extra: str) -> Run:
    """`run.py stream` in this process (numpy backend, no heartbeat)."""
    out, err = io.StringIO(), io.StringIO()
    argv = ["stream", "--input", str(csv_path), "--backend", "numpy", "--heartbeat", "0",
            *extra]
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main(argv, bundle_dir=bundle_dir)
    return Run(code, out.getvalue(), err.getvalue())


def stream_cmd(bundle_dir, csv_path, *extra: str) -> List[str]:
    return [sys.executable, str(Path(bundle_dir) / "run.py"), "stream", "--input", str(csv_path),
            "--backend", "numpy", "--heartbeat", "0", *extra]


def run_process(bundle_dir, csv_path, *extra: str, timeout: float = 120) -> Run:
    p = subprocess.run(stream_cmd(bundle_dir, csv_path, *extra), capture_output=True, text=True,
                       timeout=timeout)
    return Run(p.returncode, p.stdout, p.stderr)


def rows_text(values: np.ndarray, times: Sequence[float], order: Optional[List[str]] = None,
              sep: str = ",") -> List[str]:
    """Data lines (no header) of the fixture's channels at the given epoch times."""
    names = [c for c, _ in fx.CHANNELS]
    order = order or names
    return [sep.join([format_time(t)] + [repr(float(row[names.index(c)])) for c in order])
            for t, row in zip(times, values)]


HEADER = "time," + ",".join(c for c, _ in fx.CHANNELS)


def write_lines(path, lines: Sequence[str]) -> Path:
    Path(path).write_text("\n".join(lines) + "\n")
    return Path(path)


def scores_rows(path) -> bytes:
    """A scores file without its `#` provenance lines (their start time differs run to run)."""
    return b"".join(line for line in Path(path).read_bytes().splitlines(keepends=True)
                    if not line.startswith(b"#"))
