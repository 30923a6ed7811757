"""`bondcheck summary RESULTS`: the closing summary of a scan, from its results."""
from __future__ import annotations

import sys


def register(subparsers) -> None:
    p = subparsers.add_parser(
        "summary",
        help="summarise scan results: counts by verdict and cause, entries worth a look, slowest entries",
        description="Summarise a results file written by 'bondcheck scan --out' (.jsonl, .csv, .parquet) "
                    "or a results store (the last scan's settings).",
    )
    p.add_argument("results", metavar="RESULTS", help="results file (.jsonl, .csv, .parquet) or store (.sqlite)")
    p.add_argument("--format", choices=["text", "json"], default="text")
    p.add_argument("--top", type=int, default=15, metavar="N", help="entries listed as worth a look (default 15)")
    p.set_defaults(run=run)


def run(args) -> int:
    import json
    import sqlite3

    from ..scan import EXIT_OK, EXIT_USAGE, render_summary, summarize

    try:
        tally = summarize(args.results, top=args.top)
    except FileNotFoundError:
        print(f"bondcheck summary: no such file: {args.results}", file=sys.stderr)
        return EXIT_USAGE
    except (ValueError, OSError, KeyError, sqlite3.Error) as exc:
        print(f"bondcheck summary: cannot read {args.results}: {exc}", file=sys.stderr)
        return EXIT_USAGE
    if args.format == "json":
        print(json.dumps(tally.to_dict(), indent=2))
    else:
        sys.stdout.write(render_summary(tally))
    return EXIT_OK
