"""Benchmark: compile the demo model for every board and print what each board buys and costs.

    python benchmarks/bench_boards.py                    # generate demo data, train, compile
    python benchmarks/bench_boards.py --model DIR        # reuse a model dir from `ganlet train`

Every compile is a real `ganlet compile` command in its own process (imports included), with
the model directory's cache of distilled students emptied first so each run does the whole
work (one run at the end shows the cache warm). Prints:
1. per board: the network (the teacher itself or a student), parameters, device-vs-teacher
   Spearman and max abs error, F1 on injected faults and the gap to the teacher
   (compile/fidelity.py), bundle KiB, the command's wall seconds. Besides the shipped profiles,
   one board that is NOT shipped: the smallest shipped board with less flash (--tight-kb), so
   that the table shows a board trading down to a student and what that costs;
2. all shipped boards in one command vs the slowest single shipped board (target <= 1.5x), and
   the same with the tight board added;
3. compile time beside a one-core CPU hog (a `while True: pass` process) vs without, alternated
   in one run (target <= 1.5x): the demo's `--board all` and the tight board (distillation);
4. torch threads: the tight board's compile (distillation) with --threads 2 vs --threads 1,
   alternated (the rule in compile/threads.py).
Thread variables (OMP_NUM_THREADS, ...) are removed from the commands' environment, so the
figures measure ganlet's own thread choice. Figures are printed, never asserted; the load average is printed beside them because other
processes on the machine inflate every timing.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import resource
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from contextlib import contextmanager
from pathlib import Path

from ganlet.compile.boards import DEFAULT_BOARD, list_boards, load_board
from ganlet.compile.sizing import network_counts
from ganlet.compile.student_cache import CACHE_DIR

TARGET_ALL_VS_ONE = 1.5
TARGET_HOG = 1.5
# Left out of every command's environment: the thread counts measured are ganlet's own choice.
THREAD_VARIABLES = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--model", type=Path, help="model dir to reuse (default: train the demo's)")
    p.add_argument("--work", type=Path, help="folder for data, model and bundles (default: temp)")
    p.add_argument("--distil-epochs", type=int, default=20,
                   help="distillation epochs of every compile (ganlet's default is 80)")
    p.add_argument("--tight-kb", type=int, default=100,
                   help="flash of the not-shipped tight board (the smallest board's otherwise)")
    p.add_argument("--repeats", type=int, default=2, help="alternated pairs per ratio")
    p.add_argument("--seed", type=int, default=7)
    p.add_argument("--sections", default="1234",
                   help="which sections to run (3 and 4 alone skip the per-board table)")
    args = p.parse_args(argv)
    work = args.work or Path(tempfile.mkdtemp(prefix="ganlet-bench-boards-"))
    work.mkdir(parents=True, exist_ok=True)
    print(f"work folder {work}; {os.cpu_count()} cores; load average at start "
          f"{os.getloadavg()[0]:.2f}; distillation epochs {args.distil_epochs}")
    model_dir = args.model or train_demo(work, args.seed)
    tight = write_tight_board(work, args.tight_kb)
    bench = Bench(model_dir, work, args.distil_epochs)

    if "1" in args.sections or "2" in args.sections:
        rows = per_board(bench, tight)
        if "2" in args.sections:
            together(bench, rows, tight)
    if "3" in args.sections:
        hog_ratios(bench, tight, args.repeats)
    if "4" in args.sections:
        thread_ratio(bench, tight, args.repeats)
    print(f"\nload average at the end {os.getloadavg()[0]:.2f}")
    return 0


def train_demo(work: Path, seed: int) -> Path:
    from ganlet.compile.model import TeacherConfig
    from ganlet.compile.pipeline import TrainOptions, train_from_file
    from ganlet.examples import pump_station

    info = pump_station.generate(work / "data", seed=seed)
    options = TrainOptions(train_until=info["train_end"], config=TeacherConfig(seed=seed),
                           seed=seed)
    result = train_from_file(Path(info["data"]), work / "model", options)
    print(f"demo teacher (default TeacherConfig): {result.describe()}")
    return result.out


def write_tight_board(work: Path, kb: int) -> Path:
    """The smallest shipped board with less flash; written to the work folder, not shipped."""
    base = load_board(DEFAULT_BOARD)
    text = Path(base.source_path).read_text()
    lines = [f'name = "{base.name}-{kb}k"' if line.startswith("name =") else
             f"storage_budget_kb = {kb}" if line.startswith("storage_budget_kb") else line
             for line in text.splitlines()]
    path = work / f"{base.name}-{kb}k.toml"
    path.write_text("\n".join(lines) + "\n")
    return path


def child_cpu_seconds() -> float:
    """User + system CPU seconds of this process's finished children."""
    usage = resource.getrusage(resource.RUSAGE_CHILDREN)
    return usage.ru_utime + usage.ru_stime


class Bench:
    def __init__(self, model_dir: Path, work: Path, epochs: int):
        self.model_dir = Path(model_dir)
        self.work = work
        self.epochs = epochs
        self.last_cpu = 0.0     # CPU seconds of the last command (all its threads)

    def compile(self, boards: str, out: Path, threads=None, warm=False) -> float:
        """Wall seconds of one `ganlet compile` command."""
        if not warm:
            shutil.rmtree(self.model_dir / CACHE_DIR, ignore_errors=True)
        shutil.rmtree(out, ignore_errors=True)
        cmd = [sys.executable, "-m", "ganlet.compile.cli", "compile", str(self.model_dir),
               "--out", str(out), "--board", boards, "--distil-epochs", str(self.epochs),
               "--quiet"] + (["--threads", str(threads)] if threads else [])
        env = {k: v for k, v in os.environ.items() if k not in THREAD_VARIABLES}
        cpu_before = child_cpu_seconds()
        started = time.perf_counter()
        subprocess.run(cmd, check=True, capture_output=True, text=True, env=env)
        wall = time.perf_counter() - started
        self.last_cpu = child_cpu_seconds() - cpu_before
        return wall

    def figures(self, bundle: Path) -> dict:
        """What a bundle runs and its fidelity, from its manifest and the compile's record."""
        raw = (bundle / "manifest.json").read_bytes()
        m = json.loads(raw)
        net = m["network"]
        params = network_counts(len(m["channels"]), net["latent"], tuple(net["encoder"]),
                                tuple(net["generator"]))[0]
        record = self.model_dir / "students" / f"{hashlib.sha256(raw).hexdigest()[:16]}.json"
        report = json.loads(record.read_text())["report"]
        return {"board": m["board"]["name"], "fidelity": m["fidelity"], "params": params,
                "network": f"{m['fidelity']['network']} enc {net['encoder']} gen "
                           f"{net['generator']}", "hop": m["hop"],
                "kib": report["bytes"]["model_and_weights"] / 1024,
                "stages": sum(report["seconds"].values())}


def per_board(bench: Bench, tight: Path) -> list:
    print("\n1. one `ganlet compile --board B` per board (cache emptied before each)")
    rows = []
    for board in [b.name for b in list_boards()] + [str(tight)]:
        out = bench.work / "single" / Path(board).stem
        seconds = bench.compile(board, out)
        rows.append({**bench.figures(out), "seconds": seconds})
    header = (f"  {'board':<13} {'network':<36} {'params':>6} {'hop':>3} {'spearman':>8} "
              f"{'max err':>8} {'F1 teach':>8} {'F1 dev':>6} {'F1 gap':>6} {'KiB':>6} "
              f"{'stages s':>8} {'command s':>9}")
    print(header)
    for r in rows:
        f = r["fidelity"]
        print(f"  {r['board']:<13} {r['network']:<36} {r['params']:>6} {r['hop']:>3} "
              f"{f['spearman']:>8.4f} {f['max_abs_error']:>8.3g} {f['f1_teacher']:>8.3f} "
              f"{f['f1_device']:>6.3f} {f['f1_gap']:>+6.3f} {r['kib']:>6.1f} "
              f"{r['stages']:>8.2f} {r['seconds']:>9.2f}")
    print(f"  ({rows[-1]['board']} is not shipped: {DEFAULT_BOARD} with less flash)")
    shipped = rows[:-1]
    small, large = shipped[0], shipped[-1]
    print(f"  smallest vs largest shipped board: {small['board']} runs {small['network']} "
          f"(Spearman {small['fidelity']['spearman']:.4f}), {large['board']} runs "
          f"{large['network']} (Spearman {large['fidelity']['spearman']:.4f}); different "
          f"networks: {'yes' if small['network'] != large['network'] else 'NO'}; largest's "
          f"agreement >= smallest's: "
          f"{'yes' if large['fidelity']['spearman'] >= small['fidelity']['spearman'] else 'NO'}")
    return rows


def together(bench: Bench, rows: list, tight: Path) -> None:
    print("\n2. all boards in one command vs one board")
    shipped = rows[:-1]
    slowest = max(shipped, key=lambda r: r["seconds"])
    seconds = bench.compile("all", bench.work / "all")
    ratio = seconds / slowest["seconds"]
    print(f"  --board all ({len(shipped)} shipped boards): {seconds:.2f} s; slowest single "
          f"shipped board {slowest['board']} {slowest['seconds']:.2f} s; ratio {ratio:.2f} "
          f"(target <= {TARGET_ALL_VS_ONE}: {'met' if ratio <= TARGET_ALL_VS_ONE else 'MISSED'})")
    names = ",".join([r["board"] for r in shipped] + [str(tight)])
    slowest_all = max(rows, key=lambda r: r["seconds"])
    seconds = bench.compile(names, bench.work / "all-tight")
    print(f"  shipped + {rows[-1]['board']} in one command: {seconds:.2f} s; slowest single "
          f"{slowest_all['board']} {slowest_all['seconds']:.2f} s; ratio "
          f"{seconds / slowest_all['seconds']:.2f}")
    warm = bench.compile(names, bench.work / "all-tight", warm=True)
    print(f"  the same command again, distilled student in the model directory's cache: "
          f"{warm:.2f} s")


@contextmanager
def cpu_hog():
    """One process spinning on one core for the duration of the block."""
    hog = subprocess.Popen([sys.executable, "-c", "while True: pass"])
    try:
        yield hog
    finally:
        hog.kill()
        hog.wait()


def alternated(bench: Bench, run, repeats: int, label_a: str, label_b: str) -> tuple:
    """Run a, b, a, b ...; prints wall and CPU seconds of each run; returns the median wall
    seconds of each. CPU seconds that grow with the wall time mean threads spinning or
    waiting; CPU seconds that stay put mean the command only got less of the machine."""
    runs = {label_a: [], label_b: []}
    for _ in range(repeats):
        for label, flag in ((label_a, False), (label_b, True)):
            wall = run(flag)
            runs[label].append((wall, bench.last_cpu))
    for label, pairs in runs.items():
        print(f"    {label}: wall {' '.join(f'{w:.2f}' for w, _ in pairs)} s, CPU "
              f"{' '.join(f'{c:.2f}' for _, c in pairs)} s")
    return tuple(statistics.median(w for w, _ in runs[k]) for k in (label_a, label_b))


def hog_ratios(bench: Bench, tight: Path, repeats: int) -> None:
    print(f"\n3. compile beside a one-core CPU hog vs without (alternated, {repeats} each; "
          f"load average now {os.getloadavg()[0]:.2f})")
    for label, boards in (("--board all", "all"), (f"--board {tight.stem}", str(tight))):

        def run(with_hog: bool, boards=boards):
            out = bench.work / "hog"
            if not with_hog:
                return bench.compile(boards, out)
            with cpu_hog():
                return bench.compile(boards, out)

        print(f"  {label}:")
        without, beside = alternated(bench, run, repeats, "without", "beside the hog")
        ratio = beside / without
        print(f"  ratio {ratio:.2f} (target <= {TARGET_HOG}: "
              f"{'met' if ratio <= TARGET_HOG else 'MISSED'})")


def thread_ratio(bench: Bench, tight: Path, repeats: int) -> None:
    print(f"\n4. torch threads: --board {tight.stem} (distillation, {bench.epochs} epochs) "
          f"with --threads 1 vs 2, alternated (load average now {os.getloadavg()[0]:.2f})")

    def run(two: bool):
        return bench.compile(str(tight), bench.work / "threads", threads=2 if two else 1)

    one, two = alternated(bench, run, repeats, "1 thread", "2 threads")
    print(f"  2 threads / 1 thread (medians): {two / one:.2f} (above 1: the second thread costs "
          "time; read the single runs too, a crowded machine shows in them)")


if __name__ == "__main__":
    sys.exit(main())
