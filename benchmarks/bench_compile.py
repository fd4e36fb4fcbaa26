"""Benchmark: compile the demo pump station's teacher for the default board and print figures.

    python benchmarks/bench_compile.py                 # generate demo data, train, compile
    python benchmarks/bench_compile.py --model DIR     # reuse a model dir from `ganlet train`

Prints wall seconds per stage (distil, quantise, pack as compile_model reports them), the
bundle's bytes without the runtime copy against the 150 KB target of the smallest board, the
student's size and the agreement figures. Targets (printed, never asserted): bundle <= 150 KB
without the runtime copy; distil + quantise + export <= 60 s on the demo data on 2 cores.
Other processes on the machine inflate the timings; the load average is printed beside them.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

import torch

from ganlet.compile.boards import DEFAULT_BOARD, load_board
from ganlet.compile.model import TeacherConfig
from ganlet.compile.pipeline import CompileOptions, TrainOptions, compile_model, train_from_file
from ganlet.compile.train import load_model
from ganlet.examples import pump_station

TARGET_BUNDLE_KB = 150      # the smallest board's flash budget (boards/a53-512.toml)
TARGET_SECONDS = 60.0       # distil + quantise + export on the demo data, 2 cores


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--model", type=Path, help="model dir to reuse (default: train one)")
    p.add_argument("--work", type=Path, help="folder for data, model and bundle (default: temp)")
    p.add_argument("--threads", type=int, default=2)
    p.add_argument("--seed", type=int, default=7)
    args = p.parse_args(argv)
    torch.set_num_threads(args.threads)
    work = args.work or Path(tempfile.mkdtemp(prefix="ganlet-bench-compile-"))
    work.mkdir(parents=True, exist_ok=True)
    print(f"work folder {work}; torch threads {torch.get_num_threads()}; "
          f"load average at start {os.getloadavg()[0]:.2f} on {os.cpu_count()} cores")

    if args.model is None:
        station = pump_station
        t0 = time.perf_counter()
        info = station.generate(work / "data", seed=args.seed)
        print(f"demo data: {info['rows']} rows -> {info['data']} "
              f"({time.perf_counter() - t0:.1f} s)")
        options = TrainOptions(train_until=info["train_end"],
                               config=TeacherConfig(seed=args.seed), seed=args.seed)
        result = train_from_file(Path(info["data"]), work / "model", options)
        print(f"teacher (default TeacherConfig): {result.describe()}")
        model_dir = result.out
    else:
        model_dir = args.model
    model = load_model(model_dir)

    board = load_board(DEFAULT_BOARD)
    load_before = os.getloadavg()[0]
    t0 = time.perf_counter()
    res = compile_model(model, work / "bundle", CompileOptions(name="bench"), model_dir=model_dir)
    wall = time.perf_counter() - t0
    load_after = os.getloadavg()[0]
    r = res.report
    s = r["seconds"]
    staged = s["distil"] + s["quantise"] + s["pack"]
    core_kb = r["bytes"]["model_and_weights"] / 1024
    plan = res.plan

    print()
    print(f"board {board.name} (default): storage {board.storage_budget_kb} KB, "
          f"RAM {board.ram_budget_mb} MB, {board.mflops_single_core:g} MFLOP/s")
    print(f"student: {plan.describe()}")
    print("stage seconds (wall):")
    for stage in ("distil", "quantise", "pack"):
        print(f"  {stage:<9} {s[stage]:8.2f}")
    print(f"  {'total':<9} {staged:8.2f}   (target <= {TARGET_SECONDS:.0f} s: "
          f"{'met' if staged <= TARGET_SECONDS else 'MISSED'}; compile_model wall {wall:.2f} s; "
          f"load average {load_before:.2f} -> {load_after:.2f} on {os.cpu_count()} cores)")
    print(f"bundle without runtime copy: {core_kb:.1f} KB of {TARGET_BUNDLE_KB} KB target "
          f"({'met' if core_kb <= TARGET_BUNDLE_KB else 'MISSED'}); estimate was "
          f"{plan.storage_bytes / 1024:.1f} KB; {r['bytes']['total'] / 1024:.1f} KB with the "
          "runtime copy")
    for name, size in sorted(r["bytes"]["files"].items()):
        if not name.startswith("ganlet/"):
            print(f"  {name:<14} {size:8d} bytes")
    q = r["quantisation"]
    print(f"student weights: {plan.parameters} parameters, fp32 {q['bytes_before']} bytes -> "
          f"int8 + scales {q['bytes_after']} bytes (x{q['compression']:.2f})")
    for key in ("teacher_vs_student", "student_vs_int8"):
        a = r[key]
        print(f"{key:<19} n {a['n']:5d}  Spearman {a['spearman']:.5f}  max abs error "
              f"{a['max_abs_error']:.3g}  max rel error {a['max_rel_error']:.3g}  "
              f"median rel error {a['median_rel_error']:.3g}")
    print(f"threshold {r['threshold_kind']} on {r['calibration_scores']} calibration scores")
    return 0


if __name__ == "__main__":
    sys.exit(main())
