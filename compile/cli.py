"""The `ganlet` command: a thin typer layer over functions in ganlet.compile.

Bad input exits with code 2 and one line on stderr; nothing here holds logic that a test
would need to reach.
"""

from __future__ import annotations

import json
import os
import sys
import warnings
from contextlib import contextmanager
from pathlib import Path
from typing import List, Optional

import typer

from ganlet.compile import __version__

app = typer.Typer(
    add_completion=False,
    no_args_is_help=True,
    help="Train a small adversarial LSTM anomaly detector, compile it for a gateway, prove "
         "parity, run detection offline. Detection is advisory: not a safety function.",
)


class UsageProblem(Exception):
    """Raised for input the user can fix; printed as one line, exit code 2."""


def fail(message: str, code: int = 2):
    typer.echo(f"error: {message}", err=True)
    raise typer.Exit(code)


INTERRUPTED_EXIT = 130     # 128 + SIGINT, as shells report a Ctrl-C (common practice)


@contextmanager
def user_errors(interrupted: str = "stopped before it finished"):
    """Turn boundary errors into one-line messages with exit code 2, Ctrl-C into one line
    saying what was interrupted (exit code 130); show warnings tidily."""
    from ganlet.compile.data import IntakeError

    with tidy_warnings() as caught:
        try:
            yield
        except (IntakeError, UsageProblem, FileNotFoundError, ValueError) as exc:
            flush_warnings(caught)
            fail(str(exc).splitlines()[0] if str(exc) else type(exc).__name__)
        except KeyboardInterrupt:
            flush_warnings(caught)
            typer.echo(f"interrupted (Ctrl-C): {interrupted}", err=True)
            raise typer.Exit(INTERRUPTED_EXIT) from None


@contextmanager
def tidy_warnings():
    """Warnings recorded and printed as `warning: ...` lines, each once, when the block ends
    (yields the list, for printing them earlier: before an error line)."""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            yield caught
        finally:
            flush_warnings(caught)


def flush_warnings(caught) -> None:
    seen = set()
    for w in caught:
        text = str(w.message)
        if text in seen or issubclass(w.category, (DeprecationWarning, FutureWarning)):
            continue
        seen.add(text)
        typer.echo(f"warning: {text}", err=True)
    caught.clear()


def version_callback(value: bool):
    if value:
        typer.echo(f"ganlet {__version__}")
        raise typer.Exit()


@app.callback()
def root(
    version: bool = typer.Option(False, "--version", callback=version_callback, is_eager=True,
                                 help="Print the version and exit."),
):
    """ganlet: adversarial LSTM anomaly detection for low-power gateways."""


def split_list(text: Optional[str]) -> Optional[List[str]]:
    if text is None or text.strip() == "":
        return None
    return [part.strip() for part in text.split(",") if part.strip()]


def parse_units(text: Optional[str]) -> dict:
    units = {}
    for item in split_list(text) or []:
        if "=" not in item:
            raise UsageProblem(f"--units item {item!r}: use name=unit, e.g. flow=L/min")
        name, unit = item.split("=", 1)
        units[name.strip()] = unit.strip()
    return units


def parse_train_until(text: Optional[str]):
    if text is None:
        return None
    try:
        return int(text)
    except ValueError:
        pass
    try:
        value = float(text)
        if 0 < value <= 1:
            return value
        raise UsageProblem(f"--train-until {text}: a fraction must lie in (0, 1]")
    except ValueError:
        return text


def progress_printer(quiet: bool):
    """A rich progress bar per training phase (stderr), or nothing with --quiet."""
    if quiet:
        return None, lambda: None
    from rich.console import Console
    from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn

    bar = Progress(TextColumn("{task.description:<12}"), BarColumn(), TextColumn("{task.completed}/{task.total}"),
                   TextColumn("{task.fields[info]}"), TimeElapsedColumn(),
                   console=Console(stderr=True), transient=False)
    tasks = {}

    def update(phase: str, epoch: int, epochs: int, losses: dict):
        if phase not in tasks:
            if not tasks:
                bar.start()
            tasks[phase] = bar.add_task(phase, total=epochs, info="")
        info = "  ".join(f"{k} {v:.4g}" for k, v in losses.items())
        bar.update(tasks[phase], completed=epoch, info=info)

    def stop():
        if tasks:          # stopping a bar that never started still prints an empty line
            bar.stop()

    return update, stop


THREADS_HELP = ("torch and BLAS threads (default: 1, the safe choice for these small networks on "
                "a shared machine; see DEVELOPERS.md 'Threads').")


@app.command()
def train(
    data: Path = typer.Argument(..., help="CSV or Parquet sensor history."),
    out: Path = typer.Option(..., "--out", "-o", help="Model directory to write."),
    sep: Optional[str] = typer.Option(None, help="CSV delimiter (default: sniffed)."),
    time_col: Optional[str] = typer.Option(None, "--time-col", help="Time column (default: auto)."),
    channels: Optional[str] = typer.Option(None, help="Comma-separated channel columns (default: all numeric)."),
    exclude: Optional[str] = typer.Option(None, help="Comma-separated columns to leave out (label-like columns are left out anyway)."),
    units: Optional[str] = typer.Option(None, help="Units, e.g. 'flow=L/min,temp=degC' (default: read from name suffixes)."),
    period: Optional[str] = typer.Option(None, help="Sampling period: seconds or e.g. '1min' (default: median spacing). A file without a time column needs it: each row is then one sample, this far apart."),
    max_fill: int = typer.Option(5, "--max-fill", help="Interpolate gaps up to this many periods; longer gaps split the series."),
    train_until: Optional[str] = typer.Option(None, "--train-until", help="End of the training span: a count of the file's rows, a fraction (0.6) or a time. Default: all data."),
    calibration: float = typer.Option(0.2, help="Fraction of the training span held back (at its end) to calibrate thresholds."),
    window: Optional[int] = typer.Option(None, help="Window length in samples (default 32, shorter for short histories)."),
    config: Optional[Path] = typer.Option(None, help="JSON or TOML file of TeacherConfig fields."),
    adversarial_epochs: Optional[int] = typer.Option(None, "--adversarial-epochs", help="Epochs of the G/D phase."),
    inversion_epochs: Optional[int] = typer.Option(None, "--inversion-epochs", help="Epochs of the encoder phase."),
    seed: Optional[int] = typer.Option(None, help="Random seed (default: the config's, else 0; runs are reproducible on CPU)."),
    rate: Optional[str] = typer.Option(None, "--rate", help="Comma-separated channels to watch by their change per period instead of their level: slow quantities that wander, such as temperatures (train suggests them)."),
    decimal: str = typer.Option(".", "--decimal", help="Decimal mark of the numbers: '.' or ',' (1,5; the separator must then differ)."),
    tz: Optional[str] = typer.Option(None, "--tz", help="Zone of times written without one: IANA name (Europe/Berlin), UTC or +hh:mm. Recorded in the bundle; the gateway reads such times in it. Default: UTC."),
    dayfirst: bool = typer.Option(False, "--dayfirst", help="Read numeric dates with the year last as day/month/year (10/11/2025 = 10 November)."),
    monthfirst: bool = typer.Option(False, "--monthfirst", help="Read them as month/day/year. Without either, such dates are refused: 03/04 cannot be read safely."),
    threads: Optional[int] = typer.Option(None, "--threads", min=1, help=THREADS_HELP),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="No progress bar or summary."),
):
    """Learn one machine's normal behaviour from a sensor history."""
    from ganlet.compile import pipeline

    with user_errors(interrupted=f"training stopped; {out} holds no complete new model "
                                 "(run `ganlet train` again)"):
        if dayfirst and monthfirst:
            raise UsageProblem("--dayfirst and --monthfirst exclude each other")
        options = pipeline.TrainOptions(
            sep=sep, time_col=time_col, channels=split_list(channels),
            exclude=split_list(exclude) or [], units=parse_units(units), period=period,
            max_fill=max_fill, train_until=parse_train_until(train_until),
            calibration=calibration, window=window, config_file=config,
            adversarial_epochs=adversarial_epochs, inversion_epochs=inversion_epochs, seed=seed,
            rate=split_list(rate) or [], decimal=decimal, tz=tz, threads=threads,
            date_order="dayfirst" if dayfirst else "monthfirst" if monthfirst else None,
        )
        progress, stop = progress_printer(quiet)
        echo = (lambda *_: None) if quiet else (lambda text: typer.echo(text, err=True))
        try:
            result = pipeline.train_from_file(data, out, options, progress=progress, echo=echo)
        finally:
            stop()
        if not quiet:
            typer.echo(result.describe())


@app.command()
def budgets():
    """Each gateway profile's budgets: flash, RAM, compute, Python and numpy (compile --board)."""
    from ganlet.compile.boards import BOARDS_DIR, DEFAULT_BOARD, board_table, list_boards

    with user_errors():
        typer.echo(board_table(list_boards()))
        typer.echo(f"\ndefault board: {DEFAULT_BOARD}   (profiles in {BOARDS_DIR}; "
                   "pass --board NAME or --board PATH.toml)")


@app.command("compile")
def compile_cmd(
    model_dir: Path = typer.Argument(..., help="Model directory written by `ganlet train`."),
    out: Path = typer.Option(..., "--out", "-o", help="Bundle directory to write (replaced if present); with several boards, the folder of one bundle per board (OUT/BOARD)."),
    board: Optional[str] = typer.Option(None, help="Board profile name or TOML path (default: the smallest, a53-512); several as a,b; 'all' for every shipped profile."),
    threshold: str = typer.Option("pot", help="Threshold policy: pot (streaming peaks-over-threshold), rolling (median + k*MAD) or static."),
    alarms_per_week: float = typer.Option(1.0, "--false-alarms-per-week", min=1e-6, help="False-alarm budget on normal data the threshold is calibrated to (pot)."),
    drift: Optional[str] = typer.Option(None, "--drift", help="A channel slowly leaving its training range: 'recentre' it onto the range while the drift lasts, so a warming machine never holds an alert open (it can also re-centre a slow fault), or 'report' it and score it as it is. Both report it once as a drift event. Default: recentre (compile/calibrate.py says why)."),
    archive: bool = typer.Option(False, "--archive", help="Also write BUNDLE_DIR.tar.gz."),
    sign_key: Optional[Path] = typer.Option(None, "--sign-key", help="Key file: sign the manifest with HMAC-SHA256 (manifest.hmac); the gateway then needs the same secret."),
    sign_ed25519: Optional[Path] = typer.Option(None, "--sign-ed25519", help="PEM Ed25519 private key (`ganlet keypair`): sign the manifest (manifest.ed25519); the gateway checks it with the public key alone."),
    name: Optional[str] = typer.Option(None, help="Asset name carried in the manifest and used for file and service names on the gateway: letters, digits, '.', '_', '-' (default: the model folder's name)."),
    distil_epochs: int = typer.Option(80, "--distil-epochs", min=1, help="Distillation epochs."),
    seed: int = typer.Option(0, help="Random seed of the distillation."),
    int8_epochs: int = typer.Option(6, "--int8-epochs", min=0, help="Epochs of training through the int8 rounding before quantising, so the int8 network reconstructs as its fp32 network does (0: plain rounding)."),
    threads: Optional[int] = typer.Option(None, "--threads", min=1, help=THREADS_HELP),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="No progress bar or summary."),
):
    """Size a network to each board, distil, quantise to int8, export ONNX and pack the bundle."""
    from ganlet.compile.calibrate import DRIFT_ACTION
    from ganlet.compile.distil import DistilConfig
    from ganlet.compile.int8_fit import Int8FitConfig
    from ganlet.compile.pack import safe_name
    from ganlet.compile.pipeline import CompileOptions

    with user_errors(interrupted=f"compile stopped; {out} was left as it was (a bundle is "
                                 "renamed into place only when complete)"):
        key = read_key(sign_key) if sign_key else None
        private_key = read_private_key(sign_ed25519) if sign_ed25519 else None
        if not (model_dir / "model.json").exists():
            raise UsageProblem(f"{model_dir} is not a model directory (no model.json); "
                               "create one with `ganlet train DATA --out DIR`")
        options = CompileOptions(board=board, threshold=threshold, archive=archive, sign_key=key,
                                 alarms_per_week=alarms_per_week,
                                 drift=drift or DRIFT_ACTION, ed25519_key=private_key,
                                 name=name or safe_name(model_dir.resolve().name),
                                 distil=DistilConfig(epochs=distil_epochs, seed=seed),
                                 int8=Int8FitConfig(epochs=int8_epochs, seed=seed),
                                 threads=threads)
        progress, stop = progress_printer(quiet)
        echo = (lambda *_: None) if quiet else (lambda text: typer.echo(text, err=True))
        try:
            text = run_compile(model_dir, out, options, progress, echo)
        finally:
            stop()
        if not quiet:
            typer.echo(text)


def run_compile(model_dir: Path, out: Path, options, progress, echo) -> str:
    """One board: OUT is the bundle. Several (a,b or all): OUT/BOARD per board, one table."""
    from ganlet.compile.pipeline import (
        ALL_BOARDS,
        boards_named,
        boards_table,
        compile_boards_dir,
        compile_dir,
    )

    if options.board is None or ("," not in options.board and options.board != ALL_BOARDS):
        return compile_dir(model_dir, out, options, progress=progress, echo=echo).describe()
    results = compile_boards_dir(model_dir, out, boards_named(options.board), options,
                                 progress=progress, echo=echo)
    return "\n\n".join([r.describe() for r in results] + [boards_table(results)])


def read_key(path: Path) -> bytes:
    """The signing key, by the gateway's own rule (runtime.manifest.read_key)."""
    from ganlet.runtime.manifest import BundleError
    from ganlet.runtime.manifest import read_key as read_key_file

    if not path.exists():
        raise UsageProblem(f"key file {path} not found")
    try:
        return read_key_file(path)
    except BundleError as exc:
        raise UsageProblem(str(exc)) from None


def read_private_key(path: Path) -> bytes:
    """A PEM Ed25519 private key, tried on a signature now rather than after distillation."""
    from ganlet.runtime.trust import BundleError, ed25519_sign

    if not path.exists():
        raise UsageProblem(f"key file {path} not found")
    data = path.read_bytes()
    try:
        ed25519_sign(data, b"")
    except BundleError as exc:
        raise UsageProblem(f"{path}: {exc}") from None
    return data


@app.command()
def keypair(
    prefix: Path = typer.Argument(..., help="Path prefix of the two files to write, e.g. keys/site-7."),
):
    """Make an Ed25519 key pair for signing bundles: PREFIX.ed25519-private.pem (stays on the
    workstation, mode 0600) and PREFIX.ed25519-public.pem (goes to the gateways). The same as
    `openssl genpkey -algorithm ed25519 -out P.pem && openssl pkey -in P.pem -pubout`."""
    from ganlet.runtime.trust import BundleError, ed25519_public_pem

    with user_errors():
        private = prefix.with_name(prefix.name + ".ed25519-private.pem")
        public = prefix.with_name(prefix.name + ".ed25519-public.pem")
        for path in (private, public):
            if path.exists():
                raise UsageProblem(f"{path} exists; keys are never overwritten")
        try:
            pem = new_private_pem()
            public_pem = ed25519_public_pem(pem)
        except BundleError as exc:
            raise UsageProblem(str(exc)) from None
        prefix.parent.mkdir(parents=True, exist_ok=True)
        fd = os.open(private, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
        with os.fdopen(fd, "wb") as fh:
            fh.write(pem)
        public.write_bytes(public_pem)
        typer.echo(f"private key: {private} (keep it on the workstation; compile --sign-ed25519)")
        typer.echo(f"public key:  {public} (copy it to the gateways; run.py --public-key)")


def new_private_pem() -> bytes:
    from ganlet.runtime.trust import CRYPTO_HINT

    try:
        from cryptography.hazmat.primitives import serialization
        from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
    except ImportError:
        raise UsageProblem(f"making keys needs the cryptography package; {CRYPTO_HINT}") from None
    return Ed25519PrivateKey.generate().private_bytes(
        serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8,
        serialization.NoEncryption())


@app.command()
def fleet(
    fleet_file: Path = typer.Argument(..., help="Fleet file (TOML) listing the assets."),
    scheduler: Optional[str] = typer.Option(None, help="Address of an existing Dask scheduler (default: an embedded LocalCluster)."),
    workers: Optional[int] = typer.Option(None, help="Worker processes of the embedded cluster (default: one per core)."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="Only the summary table."),
):
    """Train, compile and verify one detector per asset on a Dask cluster."""
    from ganlet.compile import fleet as fleet_mod

    with user_errors():
        spec = fleet_mod.load_fleet(fleet_file)
        if not quiet:
            typer.echo(f"fleet {spec.name}: {len(spec.assets)} assets -> {spec.out}", err=True)
        from rich.console import Console
        from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn

        bar = Progress(TextColumn("assets"), BarColumn(), TextColumn("{task.completed}/{task.total}"),
                       TextColumn("{task.fields[last]}"), TimeElapsedColumn(),
                       console=Console(stderr=True), disable=quiet)
        task = bar.add_task("assets", total=len(spec.assets), last="")

        def done(result, k, n):
            bar.update(task, completed=k, last=f"{result.asset}: {result.status}")
            for line in fleet_mod.warning_lines(result):   # above the bar, one line each
                bar.console.print(line, markup=False, highlight=False, soft_wrap=True)

        with bar:
            results = fleet_mod.run_fleet(spec, scheduler=scheduler, workers=workers,
                                          on_result=done)
        summary = fleet_mod.write_summary(results, spec.out / "fleet_summary.csv")
        typer.echo(fleet_mod.summary_table(results))
        typer.echo(f"summary: {summary}")
    failed = [r for r in results if r.status == "failed"]
    if failed:
        raise typer.Exit(1)


@app.command()
def demo(
    out: Path = typer.Option(Path("ganlet-demo"), "--out", "-o", help="Folder for the demo's data, model and reports."),
    quick: bool = typer.Option(False, help="Fewer epochs: a fast smoke run of the whole chain."),
    seed: int = typer.Option(7, help="Seed of the invented data and the training."),
):
    """Run everything end to end on the invented demo pump station."""
    from ganlet.compile import demo as demo_mod

    with user_errors():
        summary = demo_mod.run(out, quick=quick, seed=seed, echo=lambda t: typer.echo(t))
    typer.echo(json.dumps(summary["paths"], indent=2))


def register_reports() -> None:
    from ganlet.compile.cli_reports import register

    register(app)


register_reports()


def main() -> None:
    from ganlet.command import missing_extra

    try:
        app()
    except KeyboardInterrupt:      # outside a command (typer turns most into "Aborted!")
        typer.echo("interrupted (Ctrl-C)", err=True)
        sys.exit(INTERRUPTED_EXIT)
    except ImportError as exc:     # a command's own import of the compile extra
        message = missing_extra(exc)
        if message is None:
            raise
        typer.echo(message, err=True)
        sys.exit(2)


if __name__ == "__main__":
    main()
