"""`ganlet demo`: the whole chain on the invented Hollowmere booster station.

Generate a week of invented pump data -> train the teacher on the normal first 60 % -> compile
a bundle for the default board -> replay the test span through the bundle on the gateway path
-> verify parity -> evaluate detection against the injected incidents.
"""

from __future__ import annotations

import importlib.util
import time
from dataclasses import replace
from pathlib import Path
from typing import Callable

from ganlet.compile.model import DetectorConfig
from ganlet.compile.pipeline import TrainOptions, train_from_file

EXAMPLES_DIR = Path(__file__).resolve().parent.parent / "examples"


def load_station_module():
    path = EXAMPLES_DIR / "pump_station.py"
    if not path.exists():
        raise FileNotFoundError(f"{path} not found: the demo needs the repository's examples/ "
                                "folder (install with `pip install -e .` from a clone)")
    spec = importlib.util.spec_from_file_location("ganlet_pump_station", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def demo_config(quick: bool, seed: int) -> DetectorConfig:
    cfg = DetectorConfig(seed=seed)
    if quick:
        cfg = replace(cfg, adversarial_epochs=2, inversion_epochs=4, max_train_windows=600)
    return cfg


def run(out: Path, quick: bool = False, seed: int = 7, echo: Callable[[str], None] = print) -> dict:
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    started = time.perf_counter()
    station = load_station_module()
    echo("== 1. invented data: Hollowmere booster station, pump P2 (all values invented)")
    info = station.generate(out / "data", seed=seed)
    station.plot(info["data"], info["incidents"], out / "data" / "station.png")
    echo(f"   {info['rows']} rows -> {info['data']}; incidents -> {info['incidents']}")

    echo("== 2. train the teacher on the normal span (until " + info["train_end"] + ")")
    options = TrainOptions(train_until=info["train_end"], config=demo_config(quick, seed),
                           seed=seed)
    result = train_from_file(Path(info["data"]), out / "model", options, echo=echo)
    echo("   " + result.describe())

    paths = {"data": info["data"], "incidents": info["incidents"],
             "model": str(result.out), "training_plot": str(result.out / "training.png")}
    summary = {"paths": paths, "train_seconds": result.seconds,
               "seconds": time.perf_counter() - started}
    return summary
