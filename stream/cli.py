"""The ``shiftsieve`` command.

    shiftsieve demo [--scenario NAME]                 replay a bundled incident, print the alerts
    shiftsieve replay INPUT --events OUT.jsonl [--config FILE] [--dead-letter FILE]
                      [--report DIR [--labels LABELS] [--budget ALERTS_PER_DAY [--quiet-until TS]]]
    shiftsieve run [--config FILE] [--source URL] [--events FILE|-] [--listen HOST:PORT]
    shiftsieve evaluate INPUT LABELS [--config FILE] [--methods a,b,...] [--json]
    shiftsieve evaluate --events EVENTS [INPUT] LABELS [--config FILE] [--vectors N] [--json]
    shiftsieve tune INPUT --budget ALERTS_PER_DAY [--quiet-until TS] [--labels LABELS] [--config FILE] [--write FILE]
    shiftsieve produce --brokers HOST:PORT[,HOST:PORT] --topic TOPIC [--encoding vector|sample|otlp_json]
                       [--scenario NAME | --input FILE] [--speedup X] [--loop] [--config FILE]
    shiftsieve config check [FILE]

User mistakes (missing files, bad configuration, unusable input) end with a
one-line ``shiftsieve: error: ...`` on stderr and exit status 2, never a traceback.
"""

from __future__ import annotations

import argparse
import os
import sys

import orjson

# One BLAS thread unless the user chose otherwise, set before the imports below bring in numpy: the
# models' matrices are small (tens to hundreds of metrics), and OpenBLAS's threads cost far more than
# they give there (the report's PCP comparison: 7-13 s per method with its threads, 0.25 s with one,
# on 2 cores). The container image sets the same (deploy/Dockerfile).
for _name in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_name, "1")

from .config import ENCODINGS, ConfigError, load_config, render
from .coverage import print_notes
from .demo import DEFAULT_SCENARIO
from .labels import EvaluationError, load_labels
from .scoring import format_table, load_events, score_events
from .lines import InputError
from .replay import replay
from .report import ReportError

EXIT_USAGE = 2


def _version() -> str:
    """The installed distribution's version (pyproject.toml)."""
    from importlib.metadata import PackageNotFoundError, version
    try:
        return version("shiftsieve")
    except PackageNotFoundError:   # run from a checkout that was never installed
        return "unknown (not installed)"


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="shiftsieve",
                                     description="Streaming sparse-change detector for infrastructure telemetry.")
    parser.add_argument("--version", action="version", version=f"%(prog)s {_version()}")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    demo = sub.add_parser("demo", help="replay a bundled incident and print its alerts (no broker needed)")
    demo.add_argument("--scenario", default=DEFAULT_SCENARIO,
                      help=f"bundled incident to replay (default: {DEFAULT_SCENARIO}; see --list)")
    demo.add_argument("--list", action="store_true", help="list the bundled incidents and exit")
    demo.add_argument("--events", metavar="FILE", help="also write the alert events as JSON lines")
    demo.add_argument("--config", metavar="FILE", help="TOML configuration")

    rep = sub.add_parser("replay", help="run a recorded .jsonl, .jsonl.gz, .csv(.gz) file or a Prometheus "
                         "range-query export (.json, .json.gz) through the detector")
    rep.add_argument("input", metavar="INPUT")
    rep.add_argument("--events", metavar="OUT.jsonl", required=True, help="alert events, one JSON per line")
    rep.add_argument("--config", metavar="FILE", help="TOML configuration")
    rep.add_argument("--dead-letter", metavar="FILE", help="write rejected lines here with line number and reason")
    rep.add_argument("--quiet", action="store_true", help="no progress bar and no summary")
    rep.add_argument("--report", metavar="DIR", help="write an incident-review page (index.html and PNG figures) "
                     "into DIR (created if missing; a previous report there is replaced)")
    rep.add_argument("--labels", metavar="LABELS", help="with --report: draw and score the labelled incidents and "
                     "compare the methods on them")
    rep.add_argument("--budget", metavar="ALERTS_PER_DAY", type=float, help="with --report: recommend settings "
                     "that keep alerts within this budget on a quiet period (as shiftsieve tune)")
    rep.add_argument("--quiet-until", metavar="TS", help="with --budget: end of the quiet period, epoch seconds "
                     "or RFC 3339")

    run = sub.add_parser("run", help="run the detector as a service on a stream (stdin by default)")
    run.add_argument("--config", metavar="FILE", help="TOML configuration")
    run.add_argument("--source", metavar="URL", help="kafka://HOST:PORT[,HOST:PORT...]/TOPIC?group=NAME (one or "
                     "more bootstrap brokers), a file path, or - for stdin (default: source.url)")
    run.add_argument("--events", metavar="FILE", help="append alert events to FILE as JSON lines (- for stdout); "
                     "without it alerts go to stdout: lines for a person on a terminal, JSON lines otherwise")
    run.add_argument("--listen", metavar="HOST:PORT", help="address of /metrics, /healthz, /readyz "
                                                           "(default: http.listen, 127.0.0.1:9471)")
    run.add_argument("--dead-letter", metavar="FILE", help="write rejected messages here with a reason")

    ev = sub.add_parser("evaluate", help="compare shiftsieve with baseline detectors on a labelled input "
                                         "(or score an events file with --events)",
                        usage="shiftsieve evaluate INPUT LABELS [--config FILE] [--methods a,b,...] [--json]\n"
                              "       shiftsieve evaluate --events EVENTS [INPUT] LABELS [--config FILE] "
                              "[--vectors N] [--json]")
    ev.add_argument("paths", nargs="+", metavar="PATH",
                    help="INPUT LABELS: one replay input and its labels file; with --events: LABELS, or INPUT "
                         "LABELS (the input adds false alerts per entity-day and point-adjusted F1)")
    ev.add_argument("--events", metavar="EVENTS", help="score this alert-events file instead of running methods")
    ev.add_argument("--config", metavar="FILE", help="TOML configuration")
    ev.add_argument("--methods", metavar="a,b,...", help="methods to compare (default: all): "
                    "shiftsieve, ewma_zscore, ewma_zscore_calibrated, halfspacetrees, pcp, pcp_calibrated")
    ev.add_argument("--vectors", type=int, help="with --events: vectors in the replayed input "
                                                "(default: counted in INPUT, else from the labels file)")
    ev.add_argument("--json", action="store_true", help="print the figures as JSON")

    tune = sub.add_parser("tune", help="find the most sensitive false_alarm and k-of-m confirmation that keep "
                                       "alerts within a budget on a quiet period (exit 1 when none does)")
    tune.add_argument("input", metavar="INPUT")
    tune.add_argument("--budget", metavar="ALERTS_PER_DAY", type=float, required=True,
                      help="incidents per day the quiet period may open")
    tune.add_argument("--quiet-until", metavar="TS", help="end of the quiet period, epoch seconds or RFC 3339 "
                      "(default: before the first labelled incident, else half of the input's span)")
    tune.add_argument("--labels", metavar="LABELS", help="labels file: scores on the rest, default quiet period")
    tune.add_argument("--config", metavar="FILE", help="TOML configuration (the other settings are kept)")
    tune.add_argument("--write", metavar="FILE", help="write the TOML fragment here instead of printing it")

    prod = sub.add_parser("produce", help="write a bundled incident or a replay input into a Kafka topic, "
                                          "paced in event time (for staging and the compose stack)")
    prod.add_argument("--brokers", metavar="HOST:PORT[,HOST:PORT]", required=True, help="Kafka bootstrap servers")
    prod.add_argument("--topic", required=True, help="topic to write")
    prod.add_argument("--encoding", choices=ENCODINGS,
                      help="message encoding (default: source.encoding of the configuration)")
    what = prod.add_mutually_exclusive_group()
    what.add_argument("--scenario", metavar="NAME", help=f"bundled incident (default: {DEFAULT_SCENARIO}; see demo --list)")
    what.add_argument("--input", metavar="FILE", help="any replay input (.jsonl, .jsonl.gz, .csv(.gz), .json(.gz))")
    prod.add_argument("--speedup", metavar="X", default="0", help="send event time X times faster than real time "
                      "(60: a minute of data per second); 0 or max: as fast as possible (default)")
    prod.add_argument("--loop", action="store_true", help="start over at the end, with later timestamps, until stopped")
    prod.add_argument("--config", metavar="FILE", help="TOML configuration ([kafka] TLS/SASL, source.entity_labels, "
                      "source.step_seconds)")

    cfg = sub.add_parser("config", help="configuration tools")
    cfg_sub = cfg.add_subparsers(dest="config_command", required=True, metavar="ACTION")
    check = cfg_sub.add_parser("check", help="validate a TOML file and print the effective values")
    check.add_argument("file", nargs="?", metavar="FILE")
    return parser


def _evaluate(args: argparse.Namespace) -> int:
    from .evaluate import compare_vectors, format_comparison, input_notes, input_timestamps, load_vectors, \
        parse_methods, vector_timestamps
    if args.events is not None:
        if len(args.paths) not in (1, 2) or args.methods or (args.config and len(args.paths) == 1):
            raise EvaluationError("evaluate --events takes EVENTS [INPUT] LABELS (no --methods; --config only "
                                  "with INPUT)")
        config = load_config(args.config)
        events, labels = load_events(args.events), load_labels(args.paths[-1])
        timestamps = input_timestamps(args.paths[0], config) if len(args.paths) == 2 else None
        vectors = args.vectors
        if vectors is None and timestamps is not None:
            vectors = sum(ts.size for ts in timestamps.values())
        result = score_events(events, labels, vectors=vectors, timestamps=timestamps)
        print(orjson.dumps(result.to_dict(), option=orjson.OPT_INDENT_2).decode() if args.json
              else format_table(result))
        if timestamps is not None:
            print_notes(input_notes(timestamps, config, labels))
        return 0
    if len(args.paths) != 2 or args.vectors is not None:
        raise EvaluationError("evaluate takes INPUT LABELS (or --events EVENTS LABELS; --vectors only with --events)")
    methods = parse_methods(args.methods) if args.methods is not None else None
    config, labels = load_config(args.config), load_labels(args.paths[1])
    vectors = load_vectors(args.paths[0], config)
    rows = compare_vectors(vectors, config, labels, methods=methods)
    print(orjson.dumps([r.to_dict() for r in rows], option=orjson.OPT_INDENT_2).decode() if args.json
          else format_comparison(rows))
    print_notes(input_notes(vector_timestamps(vectors), config, labels))
    return 0


def _tune(args: argparse.Namespace) -> int:
    from .tune import EXIT_NOTHING_FITS, TuneError, format_tuning, parse_time, toml_fragment, tune
    try:
        quiet_until = parse_time(args.quiet_until) if args.quiet_until is not None else None
        labels = load_labels(args.labels) if args.labels else None
        result = tune(args.input, load_config(args.config), budget_per_day=args.budget,
                      quiet_until=quiet_until, labels=labels)
    except TuneError as exc:
        print(f"shiftsieve: error: {exc}", file=sys.stderr)
        return EXIT_USAGE
    print(format_tuning(result))
    if result.recommended is None:
        return EXIT_NOTHING_FITS
    if args.write:
        with open(args.write, "w", encoding="utf-8") as f:
            f.write(toml_fragment(result))
        print(f"\nwrote {args.write}")
    else:
        print("\n" + toml_fragment(result), end="")
    return 0


def _produce(args: argparse.Namespace) -> int:
    from .produce import ProduceError, run_produce
    try:
        return run_produce(load_config(args.config), brokers=args.brokers, topic=args.topic, encoding=args.encoding,
                           scenario=args.scenario, input_path=args.input, speedup=args.speedup, loop=args.loop)
    except ProduceError as exc:
        print(f"shiftsieve: error: {exc}", file=sys.stderr)
        return EXIT_USAGE


def main(argv: list[str] | None = None) -> int:
    args = _parser().parse_args(argv)
    try:
        if args.command == "demo":
            from .demo import list_scenarios, run_demo
            if args.list:
                print(list_scenarios())
                return 0
            return run_demo(args.scenario, load_config(args.config), events_path=args.events)
        if args.command == "replay":
            if args.report is None and (args.labels or args.budget is not None or args.quiet_until):
                raise ReportError("--labels, --budget and --quiet-until go with --report DIR")
            if args.report is not None:
                from .report import replay_with_report
                summary, page = replay_with_report(
                    args.input, load_config(args.config), directory=args.report, events_path=args.events,
                    dead_letter_path=args.dead_letter, labels_path=args.labels, budget_per_day=args.budget,
                    quiet_until=args.quiet_until, progress=not args.quiet)
            else:
                summary = replay(args.input, load_config(args.config), events_path=args.events,
                                 dead_letter_path=args.dead_letter, progress=not args.quiet)
            if not args.quiet:
                summary.print()
                if args.report is not None:
                    print(f"shiftsieve: report written to {page}", file=sys.stderr)
            return 0
        if args.command == "run":
            from .endpoints import parse_listen
            from .service import Service
            config = load_config(args.config)
            if args.listen:
                try:
                    parse_listen(args.listen)
                except ValueError as exc:
                    raise ConfigError(f"--listen: {exc}") from None
            source = args.source or config.source.url
            if source.startswith("kafka://"):
                from .kafka import parse_kafka_url
                try:
                    parse_kafka_url(source)
                except ValueError as exc:
                    raise ConfigError(f"--source: {exc}") from None
            return Service(config, source_url=source, events_path=args.events,
                           dead_letter_path=args.dead_letter, listen=args.listen).run()
        if args.command == "evaluate":
            return _evaluate(args)
        if args.command == "tune":
            return _tune(args)
        if args.command == "produce":
            return _produce(args)
        if args.command == "config":
            print(render(load_config(args.file)), end="")
            return 0
    except (ConfigError, InputError, EvaluationError, ReportError) as exc:
        print(f"shiftsieve: error: {exc}", file=sys.stderr)
        return EXIT_USAGE
    except BrokenPipeError:   # output piped into `head` and closed: not an error
        sys.stderr.close()
        return 0
    except OSError as exc:   # e.g. the events file cannot be created
        print(f"shiftsieve: error: {exc.strerror or exc}: {exc.filename or ''}".rstrip(": "), file=sys.stderr)
        return EXIT_USAGE
    except KeyboardInterrupt:
        return 130
    return EXIT_USAGE


if __name__ == "__main__":
    sys.exit(main())
