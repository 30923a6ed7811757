"""`bondcheck scan`: check a whole collection, in parallel and resumably."""
from __future__ import annotations

import argparse
import sys


def register(subparsers) -> None:
    p = subparsers.add_parser(
        "scan",
        help="check a whole collection (directories, globs, zip/tar archives, ase databases) in parallel",
        description=(
            "Check every structure in a collection. Work is remembered in a results store keyed by "
            "content and settings: run the same command again to resume an interrupted scan or to "
            "check only what is new."),
    )
    p.add_argument("paths", nargs="*", metavar="PATH",
                   help="files, directories (recursive), glob patterns, .zip/.tar(.gz) archives, ase .db files")
    p.add_argument("--from-list", metavar="FILE", action="append", default=[],
                   help="read more inputs from FILE, one a line ('-' for standard input)")
    p.add_argument("--out", metavar="FILE", action="append", default=[],
                   help="write one row per structure to FILE (.jsonl, .csv or .parquet; '-' for JSON Lines "
                        "on standard output); repeatable")
    p.add_argument("--store", metavar="FILE", default=None,
                   help="results store (SQLite) that makes scans resumable (default: bondcheck-store.sqlite)")
    p.add_argument("--no-store", action="store_true", help="keep no store: check everything, remember nothing")
    p.add_argument("--jobs", "-j", type=int, metavar="N", help="worker processes (default: all cores)")
    p.add_argument("--timeout", type=float, metavar="SECONDS",
                   help="give up on an entry after this long (status 'timeout'); default: no limit")
    p.add_argument("--executor", choices=["process", "inline", "dask"], default="process",
                   help="process: local worker processes (default); inline: this process, one at a time; "
                        "dask: an existing Dask cluster (--scheduler)")
    p.add_argument("--scheduler", metavar="ADDRESS", help="Dask scheduler address, e.g. tcp://head-node:8786")
    p.add_argument("--chunk", type=int, default=None, metavar="N", help="entries sent to a worker at a time and checked together, stage by stage (default 32)")
    p.add_argument("--retry-failed", action="store_true",
                   help="check again the entries the store has as error or timeout")
    p.add_argument("--progress", action=argparse.BooleanOptionalAction, default=None,
                   help="progress bar on standard error (default: on a terminal, off when CI is set)")
    p.add_argument("--format", choices=["text", "json"], default="text", help="format of the closing summary")
    p.add_argument("--top", type=int, default=15, metavar="N", help="entries listed as worth a look (default 15)")
    p.add_argument("--max-atoms", type=int, metavar="N",
                   help="turn away a unit cell of more than N atoms (default 50000)")
    p.add_argument("--max-file-mb", type=float, metavar="MB",
                   help="turn away a file or archive member larger than this, uncompressed (default 64)")
    p.add_argument("--anions", help="comma-separated anion elements (default: chosen by electronegativity)")
    p.add_argument("--valence", action="append", metavar="El=n", help="override valence electrons, e.g. Eu=2")
    p.add_argument("--symmetry", action=argparse.BooleanOptionalAction, default=False,
                   help="search space groups (spglib) for Wyckoff letters, multiplicities and the space group in "
                        "each row; off by default: sites are grouped by environment, which gives the same "
                        "verdicts and electron counts at nearly three times the speed (site-level findings can differ "
                        "where atoms of different orbits share one environment)")
    p.set_defaults(run=run)


def _options(args):
    from ..api import Options
    from ..bonds import Criterion
    from ..cli import _valence
    from ..elements import numbers

    valence = _valence(args.valence)
    anions = [a.strip() for a in args.anions.split(",") if a.strip()] if args.anions else None
    known = numbers()
    for el in list(valence) + (anions or []):
        if el not in known:
            raise argparse.ArgumentTypeError(f"unknown element {el!r}")
    return Options(anions=anions, valence=valence, criterion=Criterion(), symmetry=bool(getattr(args, "symmetry", False)))


def run(args) -> int:
    from ..scan import (DEFAULT_CHUNK, DEFAULT_STORE, EXIT_FLAGGED, EXIT_INTERRUPTED, EXIT_OK, EXIT_USAGE,
                        render_summary, scan)
    import sqlite3

    from ..record import StructureError
    from ..sources import read_list

    def usage(msg: str) -> int:
        print(f"bondcheck scan: {msg}", file=sys.stderr)
        return EXIT_USAGE

    try:
        options = _options(args)
    except argparse.ArgumentTypeError as exc:
        return usage(str(exc))
    inputs = list(args.paths)
    for lst in args.from_list:
        try:
            inputs.extend(read_list(lst))
        except OSError as exc:
            return usage(f"cannot read list {lst}: {exc.strerror or exc}")
    if not inputs:
        return usage("nothing to scan: give paths or --from-list")
    if args.executor == "dask" and not args.scheduler:
        return usage("--executor dask needs --scheduler ADDRESS")
    if args.jobs is not None and args.jobs < 1:
        return usage("--jobs must be at least 1")
    if args.timeout is not None and args.timeout <= 0:
        return usage("--timeout must be positive")
    for o in args.out:
        low = o.lower()
        if o != "-" and not low.endswith((".jsonl", ".ndjson", ".csv", ".parquet", ".pq")):
            return usage(f"cannot tell the format of --out {o}: use .jsonl, .csv or .parquet")
    if (args.max_atoms is not None and args.max_atoms < 1) or (args.max_file_mb is not None and args.max_file_mb <= 0):
        return usage("--max-atoms and --max-file-mb must be positive")
    from ..limits import MB, current

    try:
        limits = current().but(max_atoms=args.max_atoms,
                               max_bytes=int(args.max_file_mb * MB) if args.max_file_mb else None)
    except (ValueError, StructureError) as exc:
        return usage(str(exc))
    store = None if args.no_store else (args.store or DEFAULT_STORE)
    to_stdout = "-" in args.out
    try:
        tally = scan(inputs, options, out=args.out, store=store, jobs=args.jobs, timeout=args.timeout,
                     executor=args.executor, scheduler=args.scheduler, chunk=args.chunk or DEFAULT_CHUNK,
                     retry_failed=args.retry_failed, progress=args.progress, top=args.top, limits=limits)
    except (RuntimeError, ValueError, OSError, sqlite3.Error) as exc:
        print(f"bondcheck scan: {exc}", file=sys.stderr)
        return EXIT_USAGE
    summary_to = sys.stderr if to_stdout else sys.stdout
    if args.format == "json":
        import json

        print(json.dumps(tally.to_dict(), indent=2), file=summary_to)
    else:
        summary_to.write(render_summary(tally))
    if tally.interrupted:
        print("bondcheck scan: interrupted; run the same command again to resume", file=sys.stderr)
        return EXIT_INTERRUPTED
    if tally.entries == 0:
        print("bondcheck scan: no structure files found", file=sys.stderr)
        return EXIT_USAGE
    flagged = tally.verdicts.get("mismatch", 0) or tally.status.get("error", 0) or tally.status.get("timeout", 0)
    return EXIT_FLAGGED if flagged else EXIT_OK
