"""On-device figures for a bundle: per-hop latency, throughput, memory, cold start, vs the budget.

Figures are printed, never asserted. Measured keys:

    latency_ms_p50, latency_ms_p99   one window scored, as the stream does it once per hop
    hops_per_s                       1000 / mean latency
    cold_start_s                     `python run.py stream` spawned -> its first score event
    peak_rss_mb                      the stream process's own peak resident memory up to its
                                     first score: VmHWM of /proc/PID/status (Linux), read while
                                     it waits for more input (--follow). Not its ru_maxrss:
                                     Linux folds the spawning process's peak into the child's
                                     ru_maxrss at exec (with fork, vfork and posix_spawn alike),
                                     so a big parent inflated it. Without /proc: ru_maxrss
                                     (peak_rss_how says which). Without the cold start: this
                                     process's own ru_maxrss
    bench_rss_mb                     resource.getrusage(RUSAGE_SELF).ru_maxrss of this process
                                     (a high-water mark: later backends include earlier ones)
    bundle_kb                        bytes on disk of the whole bundle

and the same quantities under the names the manifest's board budget / estimate use
(compile/pack.py), so they can be compared line by line:

    hop_ms          = latency_ms_p99 (a budget per hop is met by the slow hops too)
    ram_mb          = peak_rss_mb
    storage_kb      = bundle files outside ganlet/ (the runtime copy is not counted, as in
                      the board profiles)
    flops_per_hop   = Network.flops_per_window(window) (one window per hop)
    mflops_single_core = flops_per_hop / mean latency (achieved, numpy or onnxruntime)
    onnxruntime     = whether onnxruntime is importable here

Lower is better for hop_ms, ram_mb, storage_kb and the latency / memory / start-up figures,
higher for hops_per_s; other keys are listed for information (no pass/fail).
"""

import json
import os
import resource
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Dict, List, Optional, Sequence, Tuple

import numpy as np

from .intake import format_time
from .lstm import Network
from .score import ScoreRule
from .scorer import available_backends, make_scorer, onnxruntime_available

HIGHER_IS_BETTER = ("hops_per_s",)
LOWER_IS_BETTER = ("hop_ms", "ram_mb", "storage_kb", "latency_ms_p50", "latency_ms_p99",
                   "peak_rss_mb", "cold_start_s", "bundle_kb")


def _rss_mb(ru_maxrss: float) -> float:
    kb = ru_maxrss  # kilobytes on Linux
    if sys.platform == "darwin":  # bytes there
        kb = kb / 1024.0
    return kb / 1024.0


def _peak_rss_mb() -> float:
    return _rss_mb(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss)


def time_hops(scorer, rule, window: int, n_channels: int, hops: int,
              seed: int = 0) -> List[float]:
    """Milliseconds per single-window score (network + score rule) over `hops` calls, after 3
    warm-up calls."""
    rng = np.random.default_rng(seed)
    windows = rng.standard_normal((hops + 3, 1, window, n_channels)).astype(np.float32)
    for w in windows[:3]:
        rule.score(w, scorer.reconstruct(w))
    out = []
    for w in windows[3:]:
        t0 = time.perf_counter()
        rule.score(w, scorer.reconstruct(w))
        out.append((time.perf_counter() - t0) * 1000.0)
    return out


def _run_command(bundle) -> List[str]:
    run_py = Path(bundle.dir) / "run.py"
    if run_py.is_file():
        return [sys.executable, str(run_py)]
    # developing from the source tree: the same CLI through the installed package
    code = ("import sys; from ganlet.runtime.cli import main; d = sys.argv.pop(1); "
            "sys.exit(main(sys.argv[1:], bundle_dir=d))")
    return [sys.executable, "-c", code, str(bundle.dir)]


def cold_start(bundle, backend: str, timeout_s: float = 120.0,
               run_args: Sequence[str] = ()) -> Tuple[Optional[float], float, str]:
    """(seconds from spawning the stream command to its first score event on stdout,
    peak RSS in MB of that process, how the peak was measured)."""
    with tempfile.TemporaryDirectory() as tmp:
        csv_path = Path(tmp) / "cold.csv"
        lines = [",".join([bundle.time_column] + list(bundle.channels))]
        for i in range(bundle.window + 1):  # + 1: a rate channel's first row only primes it
            vals = [format(float(c), ".6g") for c in bundle.center]
            lines.append(",".join([format_time(i * bundle.period_s)] + vals))
        csv_path.write_text("\n".join(lines) + "\n")
        cmd = _run_command(bundle) + [
            "stream", "--input", str(csv_path), "--backend", backend, "--score-every", "1",
            "--heartbeat", "0", "--checkpoint-every", "0", "--follow",  # alive until killed
            "--replay",  # times from 1970
            *run_args,
        ]
        t0 = time.perf_counter()
        proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL)
        found, own_peak = None, None
        try:
            for line in proc.stdout:
                if b'"event":"score"' in line:
                    found = time.perf_counter() - t0
                    break
                if time.perf_counter() - t0 > timeout_s:
                    break
            own_peak = vm_hwm_mb(proc.pid)
        finally:
            proc.kill()
            _, status, usage = os.wait4(proc.pid, 0)
            proc.returncode = -signal.SIGKILL  # reaped here, so Popen must not wait again
            proc.stdout.close()
        if own_peak is not None:
            return found, own_peak, "VmHWM"
        return found, _rss_mb(usage.ru_maxrss), "ru_maxrss"


def vm_hwm_mb(pid: int) -> Optional[float]:
    """A live process's peak resident set (VmHWM, kB in /proc/PID/status), None without it."""
    try:
        with open(f"/proc/{pid}/status") as fh:
            for line in fh:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) / 1024.0
    except (OSError, ValueError, IndexError):
        return None
    return None


def bundle_kb(bundle, runtime_copy: bool = True) -> float:
    total = os.path.getsize(Path(bundle.dir) / "manifest.json")
    for rel in bundle.manifest["files"]:
        p = Path(bundle.dir) / rel
        if p.is_file() and (runtime_copy or not rel.startswith("ganlet/")):
            total += p.stat().st_size
    return total / 1024.0


def run_bench(bundle, backends: Optional[List[str]] = None, hops: int = 200,
              cold_start_run: bool = True, run_args: Sequence[str] = ()) -> Dict:
    """run_args: the signature options the child stream needs (cli.trust_argv)."""
    results = dict(measure_backend(bundle, name, hops, cold_start_run, run_args)
                   for name in backends or available_backends(bundle))
    board = bundle.manifest.get("board", {})
    return {
        "bundle": bundle.manifest.get("name"),
        "bundle_id": bundle.bundle_id,
        "board": board.get("name"),
        "window": bundle.window,
        "hop": bundle.hop,
        "channels": len(bundle.channels),
        "hops_timed": hops,
        "python": sys.version.split()[0],
        "backends": results,
        "comparison": {name: against_board(measured, board)
                       for name, measured in results.items()},
    }


def measure_backend(bundle, name: str, hops: int, cold_start_run: bool,
                    run_args: Sequence[str]) -> tuple:
    """(backend name, its figures): per-hop latency, cold start, memory, size, throughput."""
    scorer = make_scorer(bundle, name)
    rule = ScoreRule(bundle.manifest["score"])
    ms = np.asarray(time_hops(scorer, rule, bundle.window, len(bundle.channels), hops))
    start_s, rss, how = (cold_start(bundle, scorer.name, run_args=run_args)
                         if cold_start_run else (None, None, "this process's ru_maxrss"))
    flops = Network(bundle.weights).flops_per_window(bundle.window)
    m = {
        "latency_ms_p50": float(np.percentile(ms, 50)),
        "latency_ms_p99": float(np.percentile(ms, 99)),
        "hops_per_s": float(1000.0 / ms.mean()),
        "cold_start_s": start_s,
        "peak_rss_mb": rss if rss is not None else _peak_rss_mb(),
        "peak_rss_how": how,
        "bench_rss_mb": _peak_rss_mb(),
        "bundle_kb": bundle_kb(bundle),
    }
    m.update({
        "hop_ms": m["latency_ms_p99"],
        "ram_mb": m["peak_rss_mb"],
        "storage_kb": bundle_kb(bundle, runtime_copy=False),
        "flops_per_hop": flops,
        "mflops_single_core": flops / (ms.mean() * 1e-3) / 1e6,
        "onnxruntime": onnxruntime_available(),
    })
    return scorer.name, m


def against_board(measured: dict, board: dict) -> list:
    """One row per key the board budgets or estimates: budget, estimate, measured, and
    whether the measured figure is within the budget (None when it cannot be judged)."""
    budget = board.get("budget", {}) or {}
    estimate = board.get("estimate", {}) or {}
    rows = []
    for key in sorted(set(budget) | set(estimate)):
        m = measured.get(key)
        b = budget.get(key)
        ok = None
        if m is not None and isinstance(b, (int, float)) and not isinstance(b, bool):
            if key in HIGHER_IS_BETTER:
                ok = m >= b
            elif key in LOWER_IS_BETTER:
                ok = m <= b
        rows.append({"key": key, "budget": b, "estimate": estimate.get(key),
                     "measured": m, "within_budget": ok})
    return rows


def _fmt(v) -> str:
    if v is None:
        return "-"
    if isinstance(v, bool):
        return "yes" if v else "NO"
    if isinstance(v, float):
        return f"{v:.4g}"
    return str(v)


def format_report(report: Dict) -> str:
    out = [
        f"bundle {report['bundle']} ({report['bundle_id'][:12]}) on board {report['board']}: "
        f"window {report['window']}, hop {report['hop']}, {report['channels']} channels, "
        f"{report['hops_timed']} hops timed, Python {report['python']}"
    ]
    for name, m in report["backends"].items():
        out.append(f"\n[{name}]")
        for key in ("latency_ms_p50", "latency_ms_p99", "hops_per_s", "cold_start_s",
                    "peak_rss_mb", "peak_rss_how", "bench_rss_mb", "bundle_kb", "storage_kb",
                    "flops_per_hop", "mflops_single_core"):
            out.append(f"  {key:<18} {_fmt(m[key])}")
        rows = report["comparison"].get(name) or []
        if rows:
            out.append(f"  {'budget key':<18} {'budget':>10} {'estimate':>10} {'measured':>10}  ok")
            for r in rows:
                out.append(
                    f"  {r['key']:<18} {_fmt(r['budget']):>10} {_fmt(r['estimate']):>10} "
                    f"{_fmt(r['measured']):>10}  {_fmt(r['within_budget'])}"
                )
    return "\n".join(out)


def to_json(report: Dict) -> str:
    return json.dumps(report, indent=2, sort_keys=True)
