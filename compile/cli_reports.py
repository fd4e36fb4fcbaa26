"""`ganlet verify` and `ganlet evaluate`: thin typer commands over compile.verify and
compile.evaluate. register(app) adds them to the main `ganlet` app.

Exit codes: verify 0 pass, 1 fail, 2 unusable input; evaluate 0 done, 2 unusable input.
"""

from __future__ import annotations

from pathlib import Path
from typing import List, Optional

import typer


def _fail(message: str):
    typer.echo(f"error: {message.splitlines()[0] if message else 'unusable input'}", err=True)
    raise typer.Exit(2)


def _run(fn):
    """Boundary errors -> one line on stderr and exit code 2."""
    from ganlet.compile.data import IntakeError
    from ganlet.compile.gateway import UnusableInput
    from ganlet.runtime.manifest import BundleError

    try:
        return fn()
    except (UnusableInput, IntakeError, BundleError, FileNotFoundError, ValueError) as exc:
        _fail(str(exc) or type(exc).__name__)


def verify_cmd(
    bundle: Path = typer.Argument(..., help="Bundle folder."),
    data: Path = typer.Argument(..., help="The sensor data the device read (CSV or Parquet)."),
    device_scores: Optional[Path] = typer.Option(
        None, "--device-scores", help="Scores CSV captured on the device (run.py stream "
        "--scores-out); default: run the bundle's run.py here."),
    model: Optional[Path] = typer.Option(
        None, "--model", help="The teacher's model directory the bundle was compiled from: "
        "adds device vs fp32 student and vs teacher."),
    tolerance: Optional[List[str]] = typer.Option(
        None, "--tolerance", help="Override a tolerance, KEY=VALUE (repeatable): score_rel, "
        "spearman_min, sample_agreement_min, event_match_hops, teacher_spearman_min."),
    json_out: Optional[Path] = typer.Option(None, "--json", help="Write a JSON summary."),
    html_out: Optional[Path] = typer.Option(None, "--html", help="Write an HTML report."),
):
    """Parity of device and workstation scores and alerts; exit 0 pass, 1 fail, 2 unusable."""
    from ganlet.compile import verify as v
    from ganlet.compile.cli import tidy_warnings

    with tidy_warnings():
        result = _run(lambda: v.verify(bundle, data, device_scores=device_scores,
                                       model_dir=model, tolerances=tolerance or []))
        typer.echo(result.summary())
        if json_out:
            v.write_json(result, json_out)
        if html_out:
            v.write_html(result, html_out)
    raise typer.Exit(0 if result.passed else 1)


def evaluate_cmd(
    source: Path = typer.Argument(..., help="Model directory or bundle folder."),
    data: Path = typer.Argument(..., help="Sensor data (CSV or Parquet)."),
    incidents: Optional[Path] = typer.Option(
        None, "--incidents", help="CSV start,end[,kind] (inclusive). Default: the incidents "
        "the data file's own label column marks (see --labels)."),
    labels: Optional[str] = typer.Option(
        None, "--labels", help="Without --incidents: the data file's column that marks "
        "incident rows (a number other than 0, or text other than its most common value); "
        "default: its one label-like column (anomaly, label, is_anomaly ...)."),
    start: Optional[str] = typer.Option(
        None, "--from", help="First evaluated point: a row number or a time (default: all)."),
    threshold: str = typer.Option(
        "pot", help="Policy kind for a model directory (a bundle uses its own)."),
    model: Optional[Path] = typer.Option(
        None, "--model", help="With a bundle: its teacher's model directory (adds the teacher "
        "and the baselines)."),
    alarms_per_week: float = typer.Option(
        1.0, "--false-alarms-per-week", min=1e-6,
        help="False-alarm budget on normal data for a model directory (a bundle uses its own)."),
    no_baselines: bool = typer.Option(False, "--no-baselines", help="Skip the baselines."),
    html_out: Optional[Path] = typer.Option(None, "--html", help="Write an HTML report."),
    json_out: Optional[Path] = typer.Option(None, "--json", help="Write a JSON summary."),
):
    """Detection metrics against known incidents, beside baselines under the same rule."""
    from ganlet.compile import evaluate as e
    from ganlet.compile.cli import tidy_warnings

    eval_from = int(start) if start is not None and start.isdigit() else start
    if incidents is not None and labels is not None:
        _fail("give --incidents FILE or --labels COLUMN, not both")
    with tidy_warnings():
        result = _run(lambda: e.evaluate(source, data, incidents, eval_from=eval_from,
                                         threshold=threshold,
                                         baselines=() if no_baselines else e.BASELINES,
                                         model_dir=model, alarms_per_week=alarms_per_week,
                                         labels=labels))
        typer.echo(result.summary())
        if json_out:
            e.write_json(result, json_out)
        if html_out:
            e.write_html(result, html_out)


def register(app: typer.Typer) -> None:
    app.command("verify")(verify_cmd)
    app.command("evaluate")(evaluate_cmd)
