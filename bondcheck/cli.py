"""Command line: a thin shell over the library API."""
from __future__ import annotations

import argparse
import sys

EXIT_OK, EXIT_MISMATCH, EXIT_INPUT = 0, 1, 2


def _valence(items: list[str]) -> dict[str, int]:
    out = {}
    for item in items or []:
        for part in item.split(","):
            if not part.strip():
                continue
            el, sep, n = part.partition("=")
            if not sep:
                raise argparse.ArgumentTypeError(f"--valence expects El=n, got {part!r}")
            try:
                out[el.strip()] = int(n)
            except ValueError:
                raise argparse.ArgumentTypeError(f"--valence expects an integer for {el.strip()}, got {n!r}") from None
    return out


def _positive(kind):
    def parse(text: str):
        try:
            value = kind(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected a positive number, got {text!r}") from None
        if not value > 0:
            raise argparse.ArgumentTypeError(f"expected a positive number, got {text!r}")
        return value
    return parse


def build_parser() -> argparse.ArgumentParser:
    from . import __version__

    p = argparse.ArgumentParser(
        prog="bondcheck",
        description="Check crystal structures against electron-counting (Zintl-Klemm, generalized 8-N rule) predictions.",
    )
    p.add_argument("--version", action="version", version=f"bondcheck {__version__}")
    sub = p.add_subparsers(dest="command", required=True)

    c = sub.add_parser("check", help="check structure files or directories of them")
    c.add_argument("paths", nargs="+", help="structure files (CIF, POSCAR, extxyz, pymatgen JSON ...) or directories")
    c.add_argument("--format", choices=["text", "json"], default="text")
    c.add_argument("--anions", help="comma-separated anion elements, e.g. Ga,Ge (default: chosen by electronegativity)")
    c.add_argument("--valence", action="append", metavar="El=n", help="override valence electrons, e.g. Eu=2 (repeatable)")
    c.add_argument("--block", help="check only this data block of a multi-block CIF")
    c.add_argument("--no-symmetry", action="store_true",
                   help="skip the space-group search: sites grouped by environment, no Wyckoff letters; same electron count, faster")
    c.add_argument("--max-atoms", type=_positive(int), metavar="N",
                   help="turn away a unit cell of more than N atoms (default 50000)")
    c.add_argument("--max-file-mb", type=_positive(float), metavar="MB",
                   help="turn away a file larger than this, uncompressed (default 64)")

    e = sub.add_parser("explain", help="explain what a finding means")
    e.add_argument("slug", nargs="?", help="finding slug; omit to list them all")
    for mod in _command_modules():
        mod.register(sub)
    return p


# Further subcommands live in bondcheck/commands/<name>.py, each with
# register(subparsers) (adding a parser whose defaults set run=<function>)
# and a run(args) -> exit status. Keep those modules light to import.
COMMANDS = ("scan", "summary", "report", "baseline", "gate")


def _command_modules():
    import importlib

    for name in COMMANDS:
        try:
            yield importlib.import_module(f"bondcheck.commands.{name}")
        except ModuleNotFoundError as exc:
            if exc.name != f"bondcheck.commands.{name}":
                raise


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command == "explain":
        return _explain(args.slug)
    if args.command == "check":
        return _check(parser, args)
    return args.run(args)


def _explain(slug: str | None) -> int:
    from .findings import all_findings, lookup

    if not slug:
        for s, cls in sorted(all_findings().items()):
            print(f"{s:24s} {cls.severity:8s} {cls.title}")
        return EXIT_OK
    cls = lookup(slug)
    if cls is None:
        print(f"bondcheck: no finding called {slug!r}; run 'bondcheck explain' for the list", file=sys.stderr)
        return EXIT_INPUT
    print(f"{cls.slug} ({cls.severity}): {cls.title}\n")
    print(f"What it means:\n  {cls.meaning}\n")
    print(f"When it fires:\n  {cls.fires_when}\n")
    print(f"What to check next:\n  {cls.next_steps}")
    return EXIT_OK


def _check(parser, args) -> int:
    from pathlib import Path

    from .api import Options, check_all
    from .bonds import Criterion
    from .record import StructureError

    try:
        valence = _valence(args.valence)
    except argparse.ArgumentTypeError as exc:
        parser.error(str(exc))
    from . import elements

    known = elements.numbers()
    anions = [a.strip() for a in args.anions.split(",") if a.strip()] if args.anions else None
    for el in list(valence) + (anions or []):
        if el not in known:
            parser.error(f"unknown element {el!r}")
    opts = Options(anions=anions, valence=valence, criterion=Criterion(), symmetry=not args.no_symmetry)
    sources = []
    missing = []
    for p in args.paths:
        (sources if Path(p).exists() else missing).append(p)
    results = []
    from .api import Result

    for p in missing:
        results.append(Result(path=p, status="error", error="no such file or directory"))
    from .limits import MB, applied

    max_bytes = int(args.max_file_mb * MB) if args.max_file_mb else None
    with applied(max_atoms=args.max_atoms, max_bytes=max_bytes):
        if args.block:
            from .api import check_crystal
            from .read import read

            for p in sources:
                try:
                    results.extend(check_crystal(c, opts) for c in read(p, block=args.block))
                except StructureError as exc:
                    results.append(Result(path=p, status="error", error=str(exc)))
        else:
            results.extend(check_all(sources, options=opts))
    if args.format == "json":
        from .render.json import to_json

        print(to_json(results))
    else:
        from .render.text import render

        sys.stdout.write(render(results))
    if any(r.status != "ok" for r in results) or not results:
        if not results:
            print("bondcheck: no structure files found", file=sys.stderr)
        return EXIT_INPUT
    if any(r.verdict == "mismatch" for r in results):
        return EXIT_MISMATCH
    return EXIT_OK


if __name__ == "__main__":
    sys.exit(main())
