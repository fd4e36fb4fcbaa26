"""The gateway command line: `python3 run.py stream | bench | check`.

A thin argparse layer over load_bundle, make_scorer, run_stream and run_bench. Exit codes:
0 done, 1 the bundle (or its signature) was refused, 2 bad usage or input header (a channel
missing, a column named twice, an unknown --tz), 3 a state / output file could not be used
(a malformed state file included), 4 the input held no usable data row (empty, a header only,
or every data row refused: stderr says why).
"""

import argparse
import json
import sys
from typing import List, Optional

from .checkpoint import CheckpointError
from .clock import BACKLOG_DAYS, CONFIRM_ROWS, MAX_AHEAD_S
from .intake import DECIMALS, Dialect
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
    _input_options(s)

    b = sub.add_parser("bench", parents=[common], help="latency, throughput, memory, cold start")
    b.add_argument("--backend", choices=BACKENDS + ("all",), default="all")
    b.add_argument("--hops", type=int, default=200)
    b.add_argument("--no-cold-start", action="store_true", help="skip the subprocess cold start")
    b.add_argument("--json", action="store_true")

    c = sub.add_parser("check", parents=[common], help="verify the bundle and print a summary")
    c.add_argument("--json", action="store_true")
    return p


def _input_options(s: argparse.ArgumentParser) -> None:
    """How the input is read and which times are believed (intake.py and clock.py say more)."""
    g = s.add_argument_group("input dialect (as for `ganlet train`)")
    g.add_argument("--sep", help="CSV separator (default: the one that splits the header into "
                                 "the bundle's columns); TAB as '\t'")
    g.add_argument("--decimal", choices=DECIMALS, default=".",
                   help="decimal mark of numbers (',' for 1,5; the separator must differ)")
    g.add_argument("--tz", metavar="NAME",
                   help="zone of times written without one: IANA name, UTC or +hh:mm "
                        "(default: the zone the bundle was trained in, else UTC)")
    order = g.add_mutually_exclusive_group()
    order.add_argument("--dayfirst", dest="date_order", action="store_const", const="dayfirst",
                       help="read numeric dates with the year last as day/month/year")
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
    tz = args.tz if args.tz is not None else bundle.manifest.get("time_zone")
    if args.max_ahead < 0 or args.backlog_days < 0 or args.confirm_rows < 2:
        raise ValueError("--max-ahead and --backlog-days must be >= 0, --confirm-rows >= 2")
    return Dialect(sep=sep, decimal=args.decimal, tz=tz, date_order=args.date_order)


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
        summary = bundle.summary()
        summary["verified"] = True
        if args.json:
            print(json.dumps(summary, indent=2, sort_keys=True))
        else:
            print(f"bundle OK: {summary['name']} ({summary['bundle_id'][:12]}), "
                  f"{summary['files']} files verified, "
                  f"{'signed' if summary['signed'] else 'unsigned'}")
            chans = ", ".join(f"{c['name']} [{c['unit']}]"
                              + (" by rate" if c["feature"] == "rate" else "")
                              for c in summary["channels"])
            print(f"  channels: {chans}")
            print(f"  window {summary['window']} x {summary['period_s']} s, hop {summary['hop']}, "
                  f"threshold {summary['threshold']}, board {summary['board']}")
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
    try:
        dialect = _dialect(args, bundle)
    except ValueError as exc:
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
        checkpoint_every=args.checkpoint_every, heartbeat=args.heartbeat, dialect=dialect,
        replay=args.replay, max_ahead=args.max_ahead, backlog_days=args.backlog_days,
        confirm_rows=args.confirm_rows,
    )
    try:
        return run_stream(bundle, scorer, opts)
    except CheckpointError as exc:
        sys.stderr.write(f"error: {exc}\n")
        return 3
    except OSError as exc:
        sys.stderr.write(f"error: {exc}\n")
        return 3


if __name__ == "__main__":
    sys.exit(main())
