"""`bondcheck baseline write|show|prune`: the findings a repository lives with.

write  check the selected files and record their findings (at or above the
       report level, not covered by an acceptance); with PATHS, only the
       entries of those files are replaced.
show   list the entries.
prune  check again and drop the entries no longer found.
"""
from __future__ import annotations

import sys


def register(subparsers) -> None:
    from .gate import add_common

    p = subparsers.add_parser("baseline", help="record, list or prune the known findings that bondcheck gate keeps quiet")
    sub = p.add_subparsers(dest="baseline_action", required=True)
    w = sub.add_parser("write", help="check the structure files and record their findings as the baseline")
    add_common(w)
    w.set_defaults(run=run_write)
    s = sub.add_parser("show", help="list the baseline's entries")
    s.add_argument("--config", metavar="FILE", help="configuration file (default: discovered upward)")
    s.add_argument("--baseline", metavar="FILE", help="baseline file (default: the configuration's)")
    s.add_argument("--format", choices=("text", "json"), default="text")
    s.set_defaults(run=run_show)
    r = sub.add_parser("prune", help="check again and drop the entries that are no longer found")
    add_common(r)
    r.add_argument("--dry-run", action="store_true", help="list what would be dropped without writing")
    r.set_defaults(run=run_prune)


def _setup(args):
    from .gate import load_config

    cfg = load_config(args)
    path = cfg.baseline_path if not args.baseline else _abs(args.baseline)
    return cfg, path


def _abs(p):
    import os
    from pathlib import Path

    return Path(os.path.abspath(p))


def _checked(cfg, args):
    from ..gate import run, select_files

    files, filtered, missing = select_files(cfg, args.paths or None)
    return run(cfg, files, baseline=None, full=not args.paths, filtered=filtered, missing=missing)


def run_write(args) -> int:
    from ..config import ConfigError
    from ..gate import EXIT_UNREADABLE, EXIT_USAGE, Baseline, GateError, baseline_entries

    try:
        cfg, path = _setup(args)
        report = _checked(cfg, args)
        kept = []
        if args.paths and path.is_file():
            files = {c.file for c in report.checked}
            kept = [e for e in Baseline.load(path).entries if e["file"] not in files]
    except (ConfigError, GateError) as exc:
        print(f"bondcheck baseline: {exc}", file=sys.stderr)
        return EXIT_USAGE
    entries = baseline_entries(report)
    try:
        Baseline(entries=kept + entries).save(path)
    except OSError as exc:
        print(f"bondcheck baseline: cannot write {path}: {exc}", file=sys.stderr)
        return EXIT_USAGE
    n_struct = len({(e["file"], e["structure"]) for e in entries})
    print(f"wrote {len(kept) + len(entries)} entr{'y' if len(kept) + len(entries) == 1 else 'ies'} to {path}: "
          f"{len(entries)} finding(s) in {n_struct} of {len(report.checked)} structure(s) checked"
          + (f", {len(kept)} kept for files not checked" if kept else ""))
    bad = report.unreadable
    for c in bad:
        print(f"  could not check {c.file}: {c.error}", file=sys.stderr)
    if bad and cfg.unreadable == "fail":
        return EXIT_UNREADABLE
    return 0


def run_show(args) -> int:
    from ..config import ConfigError, load
    from ..gate import EXIT_USAGE, Baseline, GateError

    try:
        cfg = load(args.config)
        path = _abs(args.baseline) if args.baseline else cfg.baseline_path
        bl = Baseline.load(path)
    except (ConfigError, GateError) as exc:
        print(f"bondcheck baseline: {exc}", file=sys.stderr)
        return EXIT_USAGE
    if args.format == "json":
        import json

        print(json.dumps(bl.entries, indent=2))
        return 0
    print(f"{path}: {len(bl.entries)} entr{'y' if len(bl.entries) == 1 else 'ies'}")
    by_file: dict[str, list[dict]] = {}
    for e in bl.entries:
        by_file.setdefault(e["file"], []).append(e)
    for f in sorted(by_file):
        print(f"  {f}")
        for e in by_file[f]:
            sites = f" ({', '.join(e['sites'])})" if e.get("sites") else ""
            print(f"    [{e.get('structure', '')}] {e.get('severity', '?')} {e['finding']}{sites}: {e.get('message', '')}")
    return 0


def run_prune(args) -> int:
    from ..config import ConfigError
    from ..gate import EXIT_USAGE, Baseline, GateError, run, select_files

    try:
        cfg, path = _setup(args)
        bl = Baseline.load(path)
        files, filtered, missing = select_files(cfg, args.paths or None)
        report = run(cfg, files, baseline=bl, full=not args.paths, filtered=filtered, missing=missing)
    except (ConfigError, GateError) as exc:
        print(f"bondcheck baseline: {exc}", file=sys.stderr)
        return EXIT_USAGE
    gone = {id(e) for e in report.gone}
    keep = [e for e in bl.entries if id(e) not in gone]
    for e in report.gone:
        print(f"  drop {e['file']} [{e.get('structure', '')}] {e['finding']}")
    if args.dry_run:
        print(f"would drop {len(report.gone)} of {len(bl.entries)} entries from {path}")
        return 0
    if report.gone:
        try:
            Baseline(entries=keep).save(path)
        except OSError as exc:
            print(f"bondcheck baseline: cannot write {path}: {exc}", file=sys.stderr)
            return EXIT_USAGE
    print(f"dropped {len(report.gone)} of {len(bl.entries)} entries from {path}; {len(keep)} remain")
    return 0
