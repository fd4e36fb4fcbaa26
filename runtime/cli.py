"""The gateway command line: `python3 run.py stream | bench | check`.

A thin argparse layer over load_bundle, make_scorer, run_stream and run_bench. Exit codes:
0 done, 1 the bundle (or its signature) was refused, 2 bad usage or input header,
3 a state / output file could not be used.
"""

import argparse
import json
import sys
from typing import List, Optional

from .checkpoint import CheckpointError
from .manifest import BundleError, load_bundle, read_key
from .scorer import BACKENDS, make_scorer


def _parser() -> argparse.ArgumentParser:
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("--bundle", help="bundle folder (default: the folder of run.py)")
    common.add_argument("--key", help="file holding the HMAC key the bundle was signed with")
    common.add_argument("--require-signature", action="store_true",
                        help="refuse a bundle without a valid manifest.hmac")

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
    s.add_argument("--alert-db", help="SQLite file of alerts (one row per alert)")
    s.add_argument("--backend", choices=BACKENDS, default="auto")
    s.add_argument("--score-every", type=int, default=1,
                   help="print every Nth score event (0 = none; --scores-out gets all)")
    s.add_argument("--checkpoint-every", type=float, default=30.0, metavar="SECONDS",
                   help="also checkpoint at every alert change and on SIGTERM/SIGINT (0 = only then)")
    s.add_argument("--heartbeat", type=float, default=60.0, metavar="SECONDS",
                   help="heartbeat event interval (0 = none)")
    _mqtt_options(s)

    b = sub.add_parser("bench", parents=[common], help="latency, throughput, memory, cold start")
    b.add_argument("--backend", choices=BACKENDS + ("all",), default="all")
    b.add_argument("--hops", type=int, default=200)
    b.add_argument("--no-cold-start", action="store_true", help="skip the subprocess cold start")
    b.add_argument("--json", action="store_true")

    c = sub.add_parser("check", parents=[common], help="verify the bundle and print a summary")
    c.add_argument("--json", action="store_true")
    return p


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


def _print_check(summary: dict) -> None:
    print(f"bundle OK: {summary['name']} ({summary['bundle_id'][:12]}), "
          f"{summary['files']} files verified, "
          f"{'signed' if summary['signed'] else 'unsigned'}")
    chans = ", ".join(f"{c['name']} [{c['unit']}]"
                      + (" by rate" if c["feature"] == "rate" else "")
                      for c in summary["channels"])
    print(f"  channels: {chans}")
    print(f"  window {summary['window']} x {summary['period_s']} s, hop {summary['hop']}, "
          f"threshold {summary['threshold']}, board {summary['board']}")
    mqtt = summary["mqtt"]
    print(f"  MQTT: available ({mqtt['client']})" if mqtt["available"]
          else f"  MQTT: not available. {mqtt['detail']}")


def main(argv: Optional[List[str]] = None, bundle_dir=None) -> int:
    args = _parser().parse_args(argv)
    folder = args.bundle or bundle_dir
    if folder is None:
        sys.stderr.write("error: no bundle folder; pass --bundle DIR\n")
        return 2
    try:
        key = read_key(args.key) if args.key else None
        bundle = load_bundle(folder, key=key, require_signature=args.require_signature)
    except (BundleError, OSError) as exc:
        sys.stderr.write(f"bundle refused: {exc}\n")
        return 1

    if args.command == "check":
        from .mqtt import availability

        summary = bundle.summary()
        summary["verified"] = True
        summary["mqtt"] = availability()
        if args.json:
            print(json.dumps(summary, indent=2, sort_keys=True))
        else:
            _print_check(summary)
        return 0

    if args.command == "bench":
        from .bench import format_report, run_bench, to_json

        backends = None if args.backend == "all" else [args.backend]
        if args.hops < 1:
            sys.stderr.write("error: --hops must be >= 1\n")
            return 2
        try:
            report = run_bench(bundle, backends, args.hops, cold_start_run=not args.no_cold_start)
        except BundleError as exc:
            sys.stderr.write(f"error: {exc}\n")
            return 1
        print(to_json(report) if args.json else format_report(report))
        return 0

    from .service import StreamOptions, run_stream

    if args.score_every < 0 or args.checkpoint_every < 0 or args.heartbeat < 0:
        sys.stderr.write("error: --score-every, --checkpoint-every, --heartbeat must be >= 0\n")
        return 2
    from .mqtt import MqttConfigError, MqttUnavailable

    try:
        mqtt = _mqtt_settings(args, bundle)
    except (MqttUnavailable, MqttConfigError) as exc:
        sys.stderr.write(f"error: {exc}\n")
        return 2
    try:
        scorer = make_scorer(bundle, args.backend)
    except BundleError as exc:
        sys.stderr.write(f"error: {exc}\n")
        return 1
    opts = StreamOptions(
        input=args.input, follow=args.follow, state=args.state, scores_out=args.scores_out,
        alert_db=args.alert_db, score_every=args.score_every,
        checkpoint_every=args.checkpoint_every, heartbeat=args.heartbeat, mqtt=mqtt,
    )
    try:
        return run_stream(bundle, scorer, opts)
    except CheckpointError as exc:
        sys.stderr.write(f"error: {exc}\n")
        return 3
    except MqttConfigError as exc:  # the TLS files, found unusable when the link is built
        sys.stderr.write(f"error: {exc}\n")
        return 2
    except OSError as exc:
        sys.stderr.write(f"error: {exc}\n")
        return 3


if __name__ == "__main__":
    sys.exit(main())
