"""The gateway command line: `python3 -I -B run.py stream | bench | check`.

A thin argparse layer over load_bundle, make_scorer, run_stream and run_bench.

Exit codes (the only ones; README lists them too):
  0  done: end of input, or stopped by SIGTERM / SIGINT
  1  the bundle was refused: checksums, signature, layout, an older bundle than the state
     directory has run, or a gateway too old for it
  2  bad usage or an unusable input header (a channel missing, a column named twice, an
     unknown --tz)
  3  the state file (checkpoint or the newest-bundle record) or the input could not be used
     at start; a store that fails while running (scores CSV, alert database, checkpoint
     writes) is reported as a sink_error event and retried: it never ends the service
  4  internal error (a bug: the traceback is on stderr)
  5  the input held no usable data row (empty, a header only, or every data row refused:
     stderr says why)
"""

import argparse
import json
import sys
import traceback
from typing import List, Optional

from .checkpoint import CheckpointError
from .clock import BACKLOG_DAYS, CONFIRM_ROWS, MAX_AHEAD_S
from .cusum import STATE_CHANGE_KEY
from .drift import STEP_TEXT, action_summary
from .intake import DECIMALS, Dialect
from .manifest import BundleError, load_bundle, trained_dialect
from .scorer import BACKENDS, make_scorer
from .thresholds import extrapolation_note
from .trust import read_keys

EXIT_OK, EXIT_REFUSED, EXIT_USAGE, EXIT_STATE, EXIT_INTERNAL = 0, 1, 2, 3, 4


def _parser() -> argparse.ArgumentParser:
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("--bundle", help="bundle folder (default: the folder of run.py)")
    common.add_argument("--key", help="file holding the HMAC key the bundle was signed with "
                        "(manifest.hmac); keep it outside the bundle, readable by the service only")
    common.add_argument("--public-key", help="PEM file of the Ed25519 public key the bundle was "
                        "signed for (manifest.ed25519); needs the cryptography package")
    common.add_argument("--require-signature", action="store_true",
                        help="refuse a bundle without a signature verified by --key/--public-key")
    common.add_argument("--skip-signature", action="store_true",
                        help="run a signed bundle without checking its signature (workstation "
                        "tests; the checksums are still checked)")

    p = argparse.ArgumentParser(
        prog="run.py", description="ganlet gateway runtime (advisory condition monitoring)"
    )
    sub = p.add_subparsers(dest="command")
    sub.required = True

    s = sub.add_parser("stream", parents=[common], help="score a CSV stream, emit JSON Lines events")
    s.add_argument("--input", default="-", help="CSV file, or - for standard input")
    s.add_argument("--follow", action="store_true", help="at end of file, wait for more lines")
    s.add_argument("--state", help="checkpoint file; reused on restart to resume")
    s.add_argument("--scores-out", help="CSV of time,score,threshold,alert per scored hop")
    s.add_argument("--scores-max-mb", type=float, metavar="MIB",
                   help="cap --scores-out at MIB MiB: rotate it to SCORES.1 (one old file kept)")
    s.add_argument("--alert-db", help="SQLite file of alerts (one row per alert)")
    s.add_argument("--backend", choices=BACKENDS, default="auto")
    s.add_argument("--score-every", type=int, default=1,
                   help="print every Nth score event (0 = none; --scores-out gets all)")
    s.add_argument("--checkpoint-every", type=float, default=30.0, metavar="SECONDS",
                   help="also checkpoint at every alert change and on SIGTERM/SIGINT (0 = only then)")
    s.add_argument("--heartbeat", type=float, default=60.0, metavar="SECONDS",
                   help="heartbeat event interval (0 = none)")
    s.add_argument("--allow-older", action="store_true",
                   help="run a bundle older than the newest one run with this --state folder")
    _input_options(s)
    _mqtt_options(s)

    b = sub.add_parser("bench", parents=[common], help="latency, throughput, memory, cold start")
    b.add_argument("--backend", choices=BACKENDS + ("all",), default="all")
    b.add_argument("--hops", type=int, default=200)
    b.add_argument("--no-cold-start", action="store_true", help="skip the subprocess cold start")
    b.add_argument("--json", action="store_true")

    c = sub.add_parser("check", parents=[common], help="verify the bundle and print a summary")
    c.add_argument("--json", action="store_true")
    c.add_argument("--state", help="also check (and record) it against the newest bundle run "
                   "with this state file's folder")
    c.add_argument("--allow-older", action="store_true",
                   help="with --state: accept an older bundle and make it the record")
    return p


def _input_options(s: argparse.ArgumentParser) -> None:
    """How the input is read and which times are believed (intake.py and clock.py say more)."""
    g = s.add_argument_group("input dialect (as for `ganlet train`)")
    g.add_argument("--sep", help="CSV separator (default: the one that splits the header into "
                                 "the bundle's columns); TAB as '\t'")
    g.add_argument("--decimal", choices=DECIMALS,
                   help="decimal mark of numbers (',' for 1,5; the separator must differ; "
                        "default: the training data's, manifest decimal_mark)")
    g.add_argument("--tz", metavar="NAME",
                   help="zone of times written without one: IANA name, UTC or +hh:mm "
                        "(default: the zone the bundle was trained in, else UTC)")
    order = g.add_mutually_exclusive_group()
    order.add_argument("--dayfirst", dest="date_order", action="store_const", const="dayfirst",
                       help="read numeric dates with the year last as day/month/year (default: "
                            "the training data's order, manifest date_order)")
    order.add_argument("--monthfirst", dest="date_order", action="store_const",
                       const="monthfirst", help="read them as month/day/year")
    c = s.add_argument_group("time plausibility")
    c.add_argument("--max-ahead", type=float, default=MAX_AHEAD_S, metavar="SECONDS",
                   help="refuse rows later than the gateway clock plus this (ahead_of_clock)")
    c.add_argument("--backlog-days", type=float, default=BACKLOG_DAYS, metavar="DAYS",
                   help="refuse rows older than the bundle's creation minus this (before_bundle)")
    c.add_argument("--confirm-rows", type=int, default=CONFIRM_ROWS, metavar="N",
                   help="rows that must agree before a jump in time is believed (>= 2)")
    c.add_argument("--replay", action="store_true",
                   help="the input is recorded history: no gateway-clock or bundle-date bounds "
                        "(jumps are still confirmed)")


def _dialect(args, bundle) -> Dialect:
    """ValueError with a message for options that do not fit together."""
    sep = "\t" if args.sep in ("\\t", "TAB", "tab") else args.sep
    trained = trained_dialect(bundle.manifest)
    given = {"tz": args.tz, "decimal": args.decimal, "date_order": args.date_order}
    if args.max_ahead < 0 or args.backlog_days < 0 or args.confirm_rows < 2:
        raise ValueError("--max-ahead and --backlog-days must be >= 0, --confirm-rows >= 2")
    return Dialect(sep=sep, **{k: trained[k] if v is None else v for k, v in given.items()})


def _mqtt_options(s: argparse.ArgumentParser) -> None:
    m = s.add_argument_group(
        "MQTT (needs paho-mqtt; topics and payloads: README)",
        "the broker password goes in the --mqtt-config file only, never on the command line")
    m.add_argument("--mqtt-in", nargs="?", const="", default=None, metavar="TOPIC",
                   help="read samples from MQTT instead of --input (default topic "
                        "PREFIX/NAME/samples)")
    m.add_argument("--mqtt-out", action="store_true",
                   help="also publish alerts, drift, input errors, heartbeat and status")
    m.add_argument("--mqtt-config", metavar="FILE",
                   help="INI file with an [mqtt] section (host, port, username, password, tls, "
                        "ca_file, cert_file, key_file, client_id, prefix, keepalive); mode 600")
    m.add_argument("--mqtt-host", metavar="HOST", help="broker host (default localhost)")
    m.add_argument("--mqtt-port", type=int, metavar="PORT", help="broker port (default 1883, 8883 with TLS)")
    m.add_argument("--mqtt-prefix", metavar="PREFIX", help="first topic levels (default ganlet)")
    m.add_argument("--mqtt-client-id", metavar="ID", help="MQTT client id (default ganlet-HOST-BUNDLEID8); "
                                            "keep it stable: the broker keeps the session by it")
    m.add_argument("--mqtt-tls", action="store_true", help="TLS with the system's CAs")
    m.add_argument("--mqtt-ca", metavar="FILE", help="CA certificate(s) for TLS (implies TLS)")
    m.add_argument("--mqtt-cert", metavar="FILE", help="client certificate for TLS")
    m.add_argument("--mqtt-key", metavar="FILE", help="client private key for TLS")


def _mqtt_settings(args, bundle):
    """MqttSettings from the options, or None without --mqtt-in/--mqtt-out. Raises
    MqttUnavailable / MqttConfigError (mqtt.py) with a message for the user."""
    from .mqtt import MqttConfigError, paho_module, resolve_settings

    given = {"host": args.mqtt_host, "port": args.mqtt_port, "prefix": args.mqtt_prefix,
             "client_id": args.mqtt_client_id, "tls": args.mqtt_tls, "ca_file": args.mqtt_ca,
             "cert_file": args.mqtt_cert, "key_file": args.mqtt_key}
    if args.mqtt_in is None and not args.mqtt_out:
        if args.mqtt_config or any(v not in (None, False) for v in given.values()):
            raise MqttConfigError("MQTT options need --mqtt-in and/or --mqtt-out")
        return None
    if args.mqtt_in is not None and (args.input != "-" or args.follow):
        raise MqttConfigError("--mqtt-in replaces --input and --follow; give one or the other")
    paho_module()  # raises MqttUnavailable with what to install
    given.update(subscribe=args.mqtt_in, publish=args.mqtt_out)
    return resolve_settings(given, args.mqtt_config, bundle.bundle_id)


def main(argv: Optional[List[str]] = None, bundle_dir=None) -> int:
    args = _parser().parse_args(argv)
    try:
        return _command(args, bundle_dir)
    except Exception:  # noqa: BLE001 - one documented code for a bug, with its traceback
        sys.stderr.write("internal error (please report):\n" + traceback.format_exc())
        return EXIT_INTERNAL


def _command(args, bundle_dir) -> int:
    folder = args.bundle or bundle_dir
    if folder is None:
        sys.stderr.write("error: no bundle folder; pass --bundle DIR\n")
        return EXIT_USAGE
    try:
        keys = read_keys(args.key, args.public_key)
        bundle = load_bundle(folder, key=keys["hmac-sha256"], public_key=keys["ed25519"],
                             require_signature=args.require_signature,
                             skip_signature=args.skip_signature)
    except (BundleError, OSError) as exc:
        sys.stderr.write(f"bundle refused: {exc}\n")
        return EXIT_REFUSED
    if getattr(args, "state", None):
        code = _check_rollback(bundle, args)
        if code:
            return code
    if args.command == "check":
        return _check(bundle, args)
    if args.command == "bench":
        return _bench(bundle, args)
    return _stream(bundle, args)


def _check_rollback(bundle, args) -> int:
    from .rollback import check_not_older

    try:
        note = check_not_older(args.state, bundle.manifest, bundle.bundle_id, args.allow_older)
    except BundleError as exc:
        sys.stderr.write(f"bundle refused: {exc}\n")
        return EXIT_REFUSED
    except CheckpointError as exc:
        sys.stderr.write(f"error: {exc}\n")
        return EXIT_STATE
    if note:
        sys.stderr.write(f"warning: {note}\n")
    return EXIT_OK


def signature_line(summary: dict) -> str:
    """'signed (ed25519 verified)' only after verifying; otherwise says what was not checked."""
    sigs = summary["signatures"]
    verified = sorted(k for k, v in sigs.items() if v == "verified")
    if verified:
        return f"signed ({', '.join(verified)} verified)"
    if sigs:
        return f"signature NOT verified ({', '.join(sorted(sigs))} present, --skip-signature)"
    return "unsigned (checksums catch corruption, not deliberate edits)"


def _check(bundle, args) -> int:
    from .mqtt import availability

    summary = bundle.summary()
    summary["verified"] = True
    summary["mqtt"] = availability()
    if args.json:
        print(json.dumps(summary, indent=2, sort_keys=True))
        return EXIT_OK
    print(f"bundle OK: {summary['name']} ({summary['bundle_id'][:12]}), "
          f"{summary['files']} files verified, {signature_line(summary)}")
    chans = ", ".join(f"{c['name']} [{c['unit']}]" + (" by rate" if c["feature"] == "rate" else "")
                      for c in summary["channels"])
    print(f"  channels: {chans}")
    print("  " + input_line(summary))
    print(f"  window {summary['window']} x {summary['period_s']} s, hop {summary['hop']}, "
          f"threshold {summary['threshold']}, board {summary['board']}")
    print("  " + detector_line(summary))
    mqtt = summary["mqtt"]
    print(f"  MQTT: available ({mqtt['client']})" if mqtt["available"]
          else f"  MQTT: not available. {mqtt['detail']}")
    return EXIT_OK


def input_line(summary: dict) -> str:
    """How the input is read unless options say otherwise (the training data's dialect)."""
    d = summary["input"]
    order = {"dayfirst": "read day first", "monthfirst": "read month first"}.get(
        d["date_order"], "refused unless --dayfirst or --monthfirst")
    return (f"input: time column {summary['time_column']!r}, zone-less times in "
            f"{d['tz'] or 'UTC'}, decimal mark {d['decimal']!r}, dates such as 02/03/2026 "
            f"{order}")


def detector_line(summary: dict) -> str:
    """The settings an operator asks about: budget, alert machine, what a drift does."""
    a, budget = summary["alerting"], summary.get("false_alarms") or {}
    parts = []
    if budget.get("budget_per_week") is not None:
        text = f"false-alarm budget {budget['budget_per_week']:g} a week on normal data"
        if budget.get("expected_per_week_at_most") is not None:
            text += f" (threshold expects at most {budget['expected_per_week_at_most']:.3g})"
        parts.append(text + extrapolation_note(budget))
    parts.append(f"alert after {a['min_hops']} hops above, closed below "
                 f"{a['close_ratio']:g} x threshold, cooldown {a['cooldown_hops']} hops")
    if summary.get("cusum"):
        parts.append("or while a CUSUM of the log score holds a rise above "
                     f"{summary['cusum']['limit']:.3g}"
                     + (" (a window holding a change of operating state counts as normal)"
                        if summary["cusum"].get(STATE_CHANGE_KEY) else ""))
    held = summary.get("held")
    if held:
        watched = [f"{c['name']} {n}" for c, n in zip(summary["channels"], held["limits"]) if n]
        parts.append("or while a reading repeats more times in a row than its limit ("
                     + ", ".join(watched) + ")")
    drift = summary.get("drift")
    parts.append("drift: " + action_summary(drift))
    if summary.get("alert_steps"):
        parts.append(STEP_TEXT)
    return "; ".join(parts)


def trust_argv(args) -> List[str]:
    """The signature options of this run, for a child run.py (bench's cold start)."""
    out = []
    for flag, value in (("--key", args.key), ("--public-key", args.public_key)):
        if value:
            out += [flag, value]
    return out + (["--skip-signature"] if args.skip_signature else [])


def _bench(bundle, args) -> int:
    from .bench import format_report, run_bench, to_json

    backends = None if args.backend == "all" else [args.backend]
    if args.hops < 1:
        sys.stderr.write("error: --hops must be >= 1\n")
        return EXIT_USAGE
    try:
        report = run_bench(bundle, backends, args.hops, cold_start_run=not args.no_cold_start,
                           run_args=trust_argv(args))
    except BundleError as exc:
        sys.stderr.write(f"error: {exc}\n")
        return EXIT_REFUSED
    print(to_json(report) if args.json else format_report(report))
    return EXIT_OK


def _stream(bundle, args) -> int:
    from .service import StreamOptions, run_stream

    if args.score_every < 0 or args.checkpoint_every < 0 or args.heartbeat < 0:
        sys.stderr.write("error: --score-every, --checkpoint-every, --heartbeat must be >= 0\n")
        return EXIT_USAGE
    if args.scores_max_mb is not None and not args.scores_max_mb > 0:
        sys.stderr.write("error: --scores-max-mb must be > 0\n")
        return EXIT_USAGE
    try:
        dialect = _dialect(args, bundle)
    except ValueError as exc:
        sys.stderr.write(f"error: {exc}\n")
        return 2
    from .mqtt import MqttConfigError, MqttUnavailable

    try:
        mqtt = _mqtt_settings(args, bundle)
    except (MqttUnavailable, MqttConfigError) as exc:
        sys.stderr.write(f"error: {exc}\n")
        return EXIT_USAGE
    try:
        scorer = make_scorer(bundle, args.backend)
    except BundleError as exc:
        sys.stderr.write(f"error: {exc}\n")
        return EXIT_REFUSED
    opts = StreamOptions(
        input=args.input, follow=args.follow, state=args.state, scores_out=args.scores_out,
        alert_db=args.alert_db, score_every=args.score_every,
        checkpoint_every=args.checkpoint_every, heartbeat=args.heartbeat,
        scores_max_bytes=(int(args.scores_max_mb * 2 ** 20) if args.scores_max_mb else None),
        dialect=dialect, mqtt=mqtt,
        replay=args.replay, max_ahead=args.max_ahead, backlog_days=args.backlog_days,
        confirm_rows=args.confirm_rows,
    )
    try:
        return run_stream(bundle, scorer, opts)
    except MqttConfigError as exc:  # the TLS files, found unusable when the link is built
        sys.stderr.write(f"error: {exc}\n")
        return EXIT_USAGE
    except (CheckpointError, OSError) as exc:
        sys.stderr.write(f"error: {exc}\n")
        return EXIT_STATE


if __name__ == "__main__":
    sys.exit(main())
