"""`ganlet fleet FLEET.toml`: one detector per asset, trained, compiled and verified on Dask.

Each asset is one task (train -> compile -> verify -> evaluate when incidents or labels are
given) that runs in a worker process with one torch thread. A failing asset is reported with
its reason and never stops the others. A rerun skips assets whose inputs (data hash, settings,
board) are unchanged since their last successful run.

The fleet file (TOML, our own format; see DEVELOPERS.md "Fleet files"):

    [fleet]
    name = "..."                  # free text
    out = "fleet-out"             # results folder, relative to the fleet file
    board = "a53-512"             # default board for every asset

    [train]                       # optional: TeacherConfig fields, TrainOptions fields
    [distil]                      # optional: DistilConfig fields

    [[asset]]
    id = "p1"                     # letters, digits, - and _
    data = "data/p1.csv"          # relative to the fleet file
    channels = ["a", "b"]         # optional
    rate = ["temp"]               # optional: channels watched by their change per period
    board = "a72-2g"              # optional, overrides [fleet].board; a list (["a53-512",
                                  # "a72-2g"]) compiles one bundle per board, one distillation
                                  # per distinct student (bundle/<board>/)
    incidents = "data/p1-incidents.csv"   # optional: adds a detection evaluation
    labels = "anomaly"            # optional, instead: the data file's column marking them
    train_until = "2026-03-04T00:00:00"   # optional (row count, fraction or time)
    [asset.invented]              # optional: generate the invented demo data if `data` is missing
    seed = 11
    days = 5
"""

from __future__ import annotations

import csv
import hashlib
import json
import re
import time
import traceback
import warnings
from dataclasses import asdict, dataclass, field, fields
from pathlib import Path
from typing import Callable, Optional

try:
    import tomllib
except ModuleNotFoundError:   # Python < 3.11
    import tomli as tomllib

from ganlet.compile.distil import DistilConfig
from ganlet.compile.model import TeacherConfig
from ganlet.compile.pipeline import CompileOptions

ID_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_-]*$")
TRAIN_OPTION_KEYS = ("train_until", "calibration", "period", "max_fill", "window", "seed")
SUMMARY_COLUMNS = ("asset", "status", "bundle_kb", "parity", "f1", "seconds", "reason")


class FleetError(ValueError):
    """The fleet file itself is unusable (the message says where)."""


@dataclass
class AssetSpec:
    id: str
    data: str
    board: str                     # a board name or path; several comma-separated
    channels: Optional[list] = None
    rate: list = field(default_factory=list)
    incidents: Optional[str] = None
    labels: Optional[str] = None   # the data file's label column (instead of incidents)
    train_until: object = None
    invented: Optional[dict] = None


@dataclass
class FleetSpec:
    name: str
    out: Path
    assets: list
    train: dict = field(default_factory=dict)
    distil: dict = field(default_factory=dict)
    source: str = ""


@dataclass
class AssetResult:
    asset: str
    status: str                    # ok | failed | skipped
    seconds: float = 0.0
    reason: str = ""
    bundle_kb: Optional[float] = None
    parity: Optional[str] = None   # pass | fail | None
    f1: Optional[float] = None
    input_hash: str = ""
    paths: dict = field(default_factory=dict)
    warnings: list = field(default_factory=list)   # one clean line each (run_asset)
    boards: dict = field(default_factory=dict)   # per board: network, bundle_kb, parity, f1

    def row(self) -> dict:
        return {"asset": self.asset, "status": self.status,
                "bundle_kb": "" if self.bundle_kb is None else f"{self.bundle_kb:.1f}",
                "parity": self.parity or "", "f1": "" if self.f1 is None else f"{self.f1:.3f}",
                "seconds": f"{self.seconds:.1f}", "reason": self.reason}


def load_fleet(path: Path) -> FleetSpec:
    path = Path(path)
    if not path.exists():
        raise FleetError(f"fleet file {path} not found")
    try:
        raw = tomllib.loads(path.read_text())
    except tomllib.TOMLDecodeError as exc:
        raise FleetError(f"{path}: not valid TOML ({exc})") from exc
    head = raw.get("fleet", {})
    unknown = sorted(set(raw) - {"fleet", "train", "distil", "asset"})
    if unknown:
        raise FleetError(f"{path}: unknown table(s) {', '.join(unknown)}; expected fleet, train, "
                         "distil, asset")
    board = board_text(head.get("board", "a53-512"), f"{path}: [fleet] board")
    assets = raw.get("asset", [])
    if not assets:
        raise FleetError(f"{path}: no [[asset]] entries")
    specs, seen = [], set()
    allowed = {f.name for f in fields(AssetSpec)}
    for k, a in enumerate(assets, 1):
        where = f"{path}: asset #{k}"
        extra = sorted(set(a) - allowed)
        if extra:
            raise FleetError(f"{where}: unknown key(s) {', '.join(extra)}; allowed: "
                             f"{', '.join(sorted(allowed))}")
        if "id" not in a or "data" not in a:
            raise FleetError(f"{where}: needs 'id' and 'data'")
        if not ID_RE.match(str(a["id"])):
            raise FleetError(f"{where}: id {a['id']!r} may hold letters, digits, - and _ only")
        if a.get("incidents") and a.get("labels"):
            raise FleetError(f"{where}: give 'incidents' (a file) or 'labels' (the data "
                             "file's label column), not both")
        if a["id"] in seen:
            raise FleetError(f"{where}: id {a['id']!r} is used twice")
        seen.add(a["id"])
        specs.append(AssetSpec(
            id=str(a["id"]), data=str(path.parent / a["data"]),
            board=board_text(a.get("board", board), f"{where}: board"),
            channels=a.get("channels"), rate=list(a.get("rate", [])),
            train_until=a.get("train_until"),
            incidents=str(path.parent / a["incidents"]) if a.get("incidents") else None,
            labels=str(a["labels"]) if a.get("labels") else None,
            invented=a.get("invented")))
    train = dict(raw.get("train", {}))
    check_keys(train, {f.name for f in fields(TeacherConfig)} | set(TRAIN_OPTION_KEYS),
               f"{path}: [train]")
    distil = dict(raw.get("distil", {}))
    check_keys(distil, {f.name for f in fields(DistilConfig)}, f"{path}: [distil]")
    out = path.parent / head.get("out", "fleet-out")
    return FleetSpec(name=str(head.get("name", path.stem)), out=out, assets=specs, train=train,
                     distil=distil, source=str(path))


def board_text(value, where: str) -> str:
    """A board, or a list of boards, as the comma-separated text compile --board takes."""
    names = value if isinstance(value, list) else [value]
    if not names or not all(isinstance(n, str) and n.strip() for n in names):
        raise FleetError(f"{where}: give a board name or a list of board names")
    return ",".join(n.strip() for n in names)


def check_keys(table: dict, allowed: set, where: str) -> None:
    extra = sorted(set(table) - allowed)
    if extra:
        raise FleetError(f"{where}: unknown key(s) {', '.join(extra)}; allowed: "
                         f"{', '.join(sorted(allowed))}")


def sha256_file(path: Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def ensure_data(spec: AssetSpec) -> None:
    """Generate the invented demo data for an asset that asks for it and lacks its file."""
    if not spec.invented:
        return
    if spec.train_until is None:
        spec.train_until = 0.6     # the invented data is normal over its first 60 %
    data = Path(spec.data)
    if data.exists():
        return
    from ganlet.examples import pump_station

    tmp = data.parent / f".{data.stem}-gen"
    info = pump_station.generate(tmp, days=float(spec.invented.get("days", 7)),
                            seed=int(spec.invented.get("seed", 7)))
    data.parent.mkdir(parents=True, exist_ok=True)
    Path(info["data"]).replace(data)
    if spec.incidents and not Path(spec.incidents).exists():
        Path(info["incidents"]).replace(spec.incidents)


def input_hash(spec: AssetSpec, fleet: FleetSpec) -> str:
    """What decides whether an asset's last result still stands."""
    from ganlet.compile.boards import load_board

    boards = [load_board(name) for name in spec.board.split(",")]
    parts = {
        "data": sha256_file(Path(spec.data)),
        "incidents": sha256_file(Path(spec.incidents)) if spec.incidents else None,
        "board": [sha256_file(Path(board.source_path)) for board in boards],
        "spec": {k: v for k, v in asdict(spec).items() if k not in ("data", "incidents")},
        "train": fleet.train, "distil": fleet.distil,
        "tool": __import__("ganlet.compile", fromlist=["__version__"]).__version__,
    }
    return hashlib.sha256(json.dumps(parts, sort_keys=True, default=str).encode()).hexdigest()


def run_asset(spec: AssetSpec, fleet: FleetSpec) -> AssetResult:
    """One asset, start to end, in whichever process calls it. Never raises. Warnings raised
    on the way come back in result.warnings (one line each) instead of going to the worker's
    stderr as raw `UserWarning` lines with source paths that name no asset."""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        return _run_asset(spec, fleet, caught)


def clean_warnings(caught) -> list:
    """Recorded warnings -> distinct one-line texts, the category named unless it is the plain
    UserWarning; library deprecation notices left out (as the CLI does)."""
    out = []
    for w in caught:
        if issubclass(w.category, (DeprecationWarning, FutureWarning)):
            continue
        text = " ".join(str(w.message).split())
        if w.category is not UserWarning:
            text = f"{text} ({w.category.__name__})"
        if text not in out:
            out.append(text)
    return out


def warning_lines(result: AssetResult) -> list:
    """What the CLI prints for an asset's warnings: one line each, naming the asset."""
    return [f"warning: {result.asset}: {w}" for w in result.warnings]


def _run_asset(spec: AssetSpec, fleet: FleetSpec, caught: list) -> AssetResult:
    started = time.perf_counter()
    out = Path(fleet.out) / spec.id
    try:
        import torch

        torch.set_num_threads(1)
        ensure_data(spec)
        if not Path(spec.data).exists():
            raise FileNotFoundError(f"data file {spec.data} not found")
        digest = input_hash(spec, fleet)
        previous = out / "result.json"
        if previous.exists():
            last = json.loads(previous.read_text())
            if last.get("status") == "ok" and last.get("input_hash") == digest:
                return AssetResult(**{**last, "status": "skipped", "warnings": [],
                                      "reason": "inputs unchanged since the last run",
                                      "seconds": time.perf_counter() - started})
        result = build_asset(spec, fleet, out)
        result.input_hash = digest
    except Exception as exc:   # one asset's failure must never stop the fleet
        result = AssetResult(asset=spec.id, status="failed", reason=one_line(exc))
        out.mkdir(parents=True, exist_ok=True)
        (out / "error.txt").write_text(traceback.format_exc())
    result.seconds = time.perf_counter() - started
    result.warnings = clean_warnings(caught)
    out.mkdir(parents=True, exist_ok=True)
    (out / "result.json").write_text(json.dumps(asdict(result), indent=2, default=str))
    return result


def one_line(exc: Exception) -> str:
    text = str(exc).strip().splitlines()
    return f"{type(exc).__name__}: {text[0]}" if text else type(exc).__name__


def build_asset(spec: AssetSpec, fleet: FleetSpec, out: Path) -> AssetResult:
    """Train, compile for the asset's board(s), then verify (and evaluate) each bundle. With
    several boards the row reports the worst: the largest bundle, a parity failure if any,
    the lowest F1; result.json keeps every board's figures."""
    from ganlet.compile.pipeline import boards_named, compile_boards_dir, compile_dir

    trained = train_asset(spec, fleet, out)
    options = CompileOptions(board=spec.board, name=spec.id, distil=DistilConfig(**fleet.distil))
    if "," in spec.board:
        compiled = compile_boards_dir(trained.out, out / "bundle", boards_named(spec.board),
                                      options)
        checks = [check_bundle(spec, c, trained, out, f"-{c.board.name}") for c in compiled]
    else:
        compiled = [compile_dir(trained.out, out / "bundle", options)]
        checks = [check_bundle(spec, compiled[0], trained, out, "")]
    result = AssetResult(asset=spec.id, status="ok", paths={"model": str(trained.out)},
                         bundle_kb=max(c["bundle_kb"] for c in checks),
                         parity="pass" if all(c["parity"] == "pass" for c in checks) else "fail",
                         boards={c["board"]: c for c in checks})
    f1s = [c["f1"] for c in checks if c["f1"] is not None]
    result.f1 = min(f1s) if f1s else None
    for c in checks:
        result.paths.update(c.pop("paths"))
    return result


def train_asset(spec: AssetSpec, fleet: FleetSpec, out: Path):
    from dataclasses import replace

    from ganlet.compile.pipeline import TrainOptions, train_from_file

    train = dict(fleet.train)
    options = {k: train.pop(k) for k in TRAIN_OPTION_KEYS if k in train}
    config = replace(TeacherConfig(), **train)
    topts = TrainOptions(channels=spec.channels, rate=spec.rate, config=config, **options)
    if spec.train_until is not None:
        topts.train_until = spec.train_until
    return train_from_file(Path(spec.data), out / "model", topts)


def check_bundle(spec: AssetSpec, compiled, trained, out: Path, suffix: str) -> dict:
    """Parity (and detection, when incidents or labels are given) of one compiled bundle."""
    from ganlet.compile import verify as verify_mod

    parity = verify_mod.verify(compiled.bundle, Path(spec.data), model_dir=trained.out)
    verify_mod.write_json(parity, out / f"verify{suffix}.json")
    verify_mod.write_html(parity, out / f"verify{suffix}.html")
    check = {"board": compiled.board.name, "network": compiled.plan.network_text(),
             "bundle_kb": compiled.report["bytes"]["model_and_weights"] / 1024,
             "parity": "pass" if parity.passed else "fail", "f1": None,
             "fidelity": compiled.report["fidelity"],
             "paths": {f"bundle{suffix}": str(compiled.bundle),
                       f"verify{suffix}": str(out / f"verify{suffix}.html")}}
    if spec.incidents or spec.labels:
        from ganlet.compile import evaluate as evaluate_mod

        split = trained.model.spans.calibration[1]     # evaluate after the training span
        incidents = Path(spec.incidents) if spec.incidents else None
        detection = evaluate_mod.evaluate(compiled.bundle, Path(spec.data), incidents,
                                          eval_from=split, model_dir=trained.out,
                                          labels=spec.labels)
        evaluate_mod.write_json(detection, out / f"evaluate{suffix}.json")
        evaluate_mod.write_html(detection, out / f"evaluate{suffix}.html")
        check["f1"] = float(detection.methods["bundle"].metrics["f1"])
        check["paths"][f"evaluate{suffix}"] = str(out / f"evaluate{suffix}.html")
    return check


def run_fleet(fleet: FleetSpec, scheduler: Optional[str] = None, workers: Optional[int] = None,
              on_result: Callable[[AssetResult, int, int], None] = lambda *_: None) -> list:
    """All assets on Dask: an embedded LocalCluster (one single-threaded worker process per
    core) unless `scheduler` names an existing one. Results come back as they finish."""
    import os

    from dask.distributed import Client, LocalCluster, as_completed

    cluster = None
    if scheduler:
        client = Client(scheduler)
    else:
        n = workers or os.cpu_count() or 1
        cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True,
                               dashboard_address=None, silence_logs=40)
        client = Client(cluster)
    try:
        futures = [client.submit(run_asset, spec, fleet, pure=False, key=f"asset-{spec.id}")
                   for spec in fleet.assets]
        results = []
        for future in as_completed(futures):
            try:
                result = future.result()
            except Exception as exc:  # a worker died: the asset failed, the fleet goes on
                result = AssetResult(asset=future.key.removeprefix("asset-"), status="failed",
                                     reason=f"worker lost: {one_line(exc)}")
            results.append(result)
            on_result(result, len(results), len(futures))
    finally:
        client.close()
        if cluster is not None:
            cluster.close()
    order = {spec.id: k for k, spec in enumerate(fleet.assets)}
    return sorted(results, key=lambda r: order.get(r.asset, 0))


def write_summary(results: list, path: Path) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    with open(path, "w", newline="") as fh:
        writer = csv.DictWriter(fh, fieldnames=SUMMARY_COLUMNS)
        writer.writeheader()
        for r in results:
            writer.writerow(r.row())
    return path


def summary_table(results: list) -> str:
    rows = [r.row() for r in results]
    widths = {c: max(len(c), *(len(str(row[c])) for row in rows)) for c in SUMMARY_COLUMNS}
    lines = ["  ".join(c.ljust(widths[c]) for c in SUMMARY_COLUMNS),
             "  ".join("-" * widths[c] for c in SUMMARY_COLUMNS)]
    lines += ["  ".join(str(row[c]).ljust(widths[c]) for c in SUMMARY_COLUMNS) for row in rows]
    return "\n".join(lines)
