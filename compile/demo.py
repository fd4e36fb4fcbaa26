"""`ganlet demo`: the whole chain on the invented Hollowmere booster station.

Generate a week of invented pump data -> train the teacher on the normal first 60 % -> compile
a bundle for the default board -> replay the test span through the bundle on the gateway path
-> verify parity -> evaluate detection against the injected incidents.
"""

from __future__ import annotations

import csv
import json
import time
from dataclasses import asdict, replace
from pathlib import Path
from typing import Callable

import pandas as pd

from ganlet.compile import evaluate as evaluate_mod
from ganlet.compile import verify as verify_mod
from ganlet.compile.distil import DistilConfig
from ganlet.compile.gateway import run_bundle
from ganlet.compile.model import TeacherConfig
from ganlet.compile.pipeline import (
    CompileOptions,
    TrainOptions,
    TrainResult,
    compile_dir,
    train_from_file,
)
from ganlet.compile.train import load_model
from ganlet.examples import pump_station


def demo_config(quick: bool, seed: int) -> TeacherConfig:
    cfg = TeacherConfig(seed=seed)
    if quick:
        cfg = replace(cfg, adversarial_epochs=2, inversion_epochs=4, max_train_windows=600)
    return cfg


def run(out: Path, quick: bool = False, seed: int = 7, echo: Callable[[str], None] = print) -> dict:
    out = Path(out)
    started = time.perf_counter()
    info, result, compiled, test_csv, replay = replay_on_gateway(out, quick, seed, echo)
    echo(alerts_beside_incidents(replay["alerts"], Path(info["incidents"])))
    echo(f"   {replay['hops']} hops scored; input errors {replay['errors']}; "
         f"events in {replay['events']}")
    for line in replay["feed_notes"]:
        echo("   " + line)

    reports = out / "reports"
    parity, detection = write_reports(compiled.bundle, result.out, info, test_csv, replay,
                                      reports, echo)

    paths = {"data": info["data"], "incidents": info["incidents"],
             "model": str(result.out), "training_plot": str(result.out / "training.png"),
             "bundle": str(compiled.bundle), "gateway_events": replay["events"],
             "gateway_scores": replay["scores"], "gateway_alerts": replay["alert_db"],
             "parity_report": str(reports / "parity.html"),
             "detection_report": str(reports / "detection.html")}
    echo(f"== parity verdict: {'PASS' if parity.passed else 'FAIL'}; reports: "
         f"{paths['parity_report']} and {paths['detection_report']}")
    summary = {"paths": paths, "train_seconds": result.seconds,
               "compile": compiled.report, "alerts": replay["alerts"],
               "parity_passed": parity.passed, "detection": detection.to_json(),
               "seconds": time.perf_counter() - started}
    (out / "demo_summary.json").write_text(json.dumps(summary, indent=2, default=str))
    return summary


def replay_on_gateway(out: Path, quick: bool, seed: int, echo: Callable[[str], None],
                      reuse_model: bool = False) -> tuple:
    """Steps 1-4: invent the data, train, compile for the default board and replay the test
    span through the bundle's run.py; returns (info, trained, compiled, test_csv, replay).
    reuse_model: a model already trained in out/model with the same configuration is kept
    (benchmarks judging a change after training; a change to training needs a fresh `out`)."""
    out.mkdir(parents=True, exist_ok=True)
    echo("== 1. invented data: Hollowmere booster station, pump P2 (all values invented)")
    info = pump_station.generate(out / "data", seed=seed)
    pump_station.plot(info["data"], info["incidents"], out / "data" / "station.png")
    echo(f"   {info['rows']} rows -> {info['data']}; incidents -> {info['incidents']}")

    echo("== 2. train the teacher on the normal span (until " + info["train_end"] + ")")
    config = demo_config(quick, seed)
    asked = out / "model_asked.json"   # the configuration the kept model was trained with
    result = kept_model(out / "model", asked, config) if reuse_model else None
    if result is None:
        options = TrainOptions(train_until=info["train_end"], config=config, seed=seed)
        result = train_from_file(Path(info["data"]), out / "model", options, echo=echo)
        asked.write_text(json.dumps(asdict(config)))
    echo("   " + result.describe().replace("\n", "\n   "))

    echo("== 3. compile for the default board")
    compiled = compile_dir(result.out, out / "bundle",
                           CompileOptions(name="hollowmere-p2",
                                          distil=DistilConfig(epochs=3 if quick else 80,
                                                              seed=seed)),
                           echo=lambda t: echo("   " + t))
    echo("   " + compiled.describe().replace("\n", "\n   "))

    echo("== 4. replay the test span through the bundle (python3 run.py stream)")
    test_csv = out / "data" / "test_span.csv"
    write_test_span(Path(info["data"]), info["test_start"], compiled.plan.window, test_csv)
    replay = replay_through_bundle(compiled.bundle, test_csv, out / "gateway")
    return info, result, compiled, test_csv, replay


def kept_model(model_dir: Path, asked: Path, config: TeacherConfig):
    """The TrainResult of a model trained earlier in model_dir with `config` (as recorded in
    `asked`), else None."""
    if not (asked.is_file() and (model_dir / "model.json").is_file()):
        return None
    if json.loads(asked.read_text()) != json.loads(json.dumps(asdict(config))):
        return None
    return TrainResult(load_model(model_dir), model_dir, 0.0)


def write_reports(bundle: Path, model_dir: Path, info: dict, test_csv: Path, replay: dict,
                  reports: Path, echo: Callable[[str], None]) -> tuple:
    """Steps 5 and 6: the parity report (the replay's scores as the device's side) and the
    detection report against the invented incidents; returns (parity, detection)."""
    echo("== 5. parity: the gateway's scores and alerts (step 4) vs the workstation's")
    reports.mkdir(exist_ok=True)
    # The replay's scores CSV is what a device would hand the integrator: verify takes it as
    # the device's side rather than running the gateway a second time.
    parity = verify_mod.verify(bundle, test_csv, device_scores=Path(replay["scores"]),
                               model_dir=model_dir)
    verify_mod.write_json(parity, reports / "parity.json")
    verify_mod.write_html(parity, reports / "parity.html")
    echo(indent(parity.summary()))

    echo("== 6. detection on the test span against the invented incidents")
    detection = evaluate_mod.evaluate(bundle, Path(info["data"]), Path(info["incidents"]),
                                      eval_from=info["test_start"], model_dir=model_dir)
    evaluate_mod.write_json(detection, reports / "detection.json")
    evaluate_mod.write_html(detection, reports / "detection.html")
    echo(indent(detection.summary()))
    return parity, detection


def indent(text: str) -> str:
    return "\n".join("   " + line for line in text.splitlines())


def write_test_span(data: Path, test_start: str, window: int, out: Path) -> Path:
    """The test span as the gateway would receive it, with one window of lead-in so the first
    test point is scored (the lead-in rows are normal data from before the test span)."""
    rows = pd.read_csv(data)
    start = int((pd.to_datetime(rows["time"]) < pd.Timestamp(test_start)).sum())
    rows.iloc[max(0, start - window):].to_csv(out, index=False)
    return out


def replay_through_bundle(bundle: Path, data: Path, out: Path) -> dict:
    """The bundle's own run.py in a subprocess (the real gateway path), with a state file and
    an alert database as a gateway would keep them."""
    run = run_bundle(bundle, data, out, keep_state=True)
    errors = {k: v for k, v in run.stop.get("errors", {}).items() if v}
    return {"alerts": run.alerts, "hops": run.stop.get("counters", {}).get("hops", 0),
            "feed_notes": feed_notes(run.events),
            "errors": errors, "events": str(out / "events.jsonl"), "scores": str(run.scores),
            "alert_db": str(out / "alerts.sqlite")}


def feed_notes(events: list) -> list:
    """What the gateway said of the feed itself, a line per event: long gaps and channels
    that went blank and came back."""
    notes = []
    for e in events:
        if e["event"] == "gap":
            notes.append(f"gap {e['start']} .. {e['end']}: {e['missing_periods']} periods "
                         "missing, window reset")
        elif e["event"] == "channel_lost":
            notes.append(f"{e['channel']} lost at {e['time']} (blank since {e['since']}): "
                         "scored on the other channels")
        elif e["event"] == "channel_back":
            notes.append(f"{e['channel']} back in the score at {e['time']} (reading again "
                         f"since {e['reading_since']})")
    return notes


def moved_channel(alert: dict) -> str:
    """The alert's `moved` channel (the gateway's counterfactual), else its top share."""
    return (alert.get("moved") or alert["channels"][0])["name"]


def incident_hits(alerts: list, incidents_csv: Path) -> tuple:
    """([(incident row, [(alert, delay in minutes), ...]), ...], alerts outside every incident):
    an alert counts for an incident when it is open at any time inside it."""
    with open(incidents_csv, newline="") as fh:
        incidents = list(csv.DictReader(fh))
    used, hits = set(), []
    for inc in incidents:
        start, end = pd.Timestamp(inc["start"]), pd.Timestamp(inc["end"])
        found = []
        for a in alerts:
            opened = pd.Timestamp(a["opened"]).tz_localize(None)
            closed = pd.Timestamp(a["closed"]).tz_localize(None) if a["closed"] else opened
            if opened <= end and closed >= start:
                used.add(a["alert_id"])
                found.append((a, max(0.0, (opened - start).total_seconds() / 60)))
        hits.append((inc, found))
    return hits, [a for a in alerts if a["alert_id"] not in used]


def alerts_beside_incidents(alerts: list, incidents_csv: Path) -> str:
    """A plain table: each incident with the alerts that overlap it, then the other alerts."""
    hits, others = incident_hits(alerts, incidents_csv)
    lines = [f"   {'incident':<14} {'start':<17} {'end':<17} alert(s) [moved channel, delay]"]
    for inc, found in hits:
        start, end = pd.Timestamp(inc["start"]), pd.Timestamp(inc["end"])
        text = "; ".join(f"{pd.Timestamp(a['opened']).tz_localize(None):%m-%d %H:%M} "
                         f"[{moved_channel(a)}, +{delay:.0f} min]" for a, delay in found)
        lines.append(f"   {inc['kind']:<14} {start:%m-%d %H:%M}      {end:%m-%d %H:%M}      "
                     + (text or "MISSED"))
    lines.append(f"   alerts outside any incident: {len(others)}")
    for a in others:
        opened = pd.Timestamp(a["opened"]).tz_localize(None)
        lines.append(f"     {opened:%m-%d %H:%M}  peak {a['peak_score']:.3g}  "
                     f"moved channel {moved_channel(a)}")
    return "\n".join(lines)
