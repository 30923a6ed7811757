"""`bondcheck gate`: check a structure repository for CI.

Reads the configuration (bondcheck.toml or [tool.bondcheck] in
pyproject.toml), checks the selected or changed structure files, keeps
accepted and baseline findings quiet and fails on new ones. Exit status:
0 pass, 1 new findings at or above the failing severity, 2 usage or
configuration error, 3 inputs that could not be read or checked.
"""
from __future__ import annotations

import argparse
import sys

FORMATS = ("text", "json", "markdown", "junit", "sarif")


def add_common(p: argparse.ArgumentParser) -> None:
    p.add_argument("paths", nargs="*", help="files or folders to check (default: the configuration's paths)")
    p.add_argument("--config", metavar="FILE", help="configuration file (default: bondcheck.toml or pyproject.toml "
                   "with [tool.bondcheck], searched upward from the working directory)")
    p.add_argument("--baseline", metavar="FILE", help="baseline file (default: the configuration's, bondcheck-baseline.json beside it)")
    p.add_argument("--fail-on", choices=("info", "warning", "error", "never"), help="lowest severity that fails the run (default: warning)")
    p.add_argument("--unreadable", choices=("fail", "finding"),
                   help="inputs that cannot be read: fail the run with exit 3 (default) or report them as error findings")


def register(subparsers) -> None:
    p = subparsers.add_parser(
        "gate",
        help="check a structure repository in CI: configuration, baseline, changed files, JUnit/SARIF/Markdown reports",
        description="Check the structure files of a repository and fail only on new findings. "
        "Exit status: 0 pass, 1 new findings at or above the failing severity, 2 usage or configuration error, "
        "3 inputs that could not be read or checked.",
    )
    add_common(p)
    p.add_argument("--changed-since", metavar="REF",
                   help="check only structure files added or modified since the merge base of REF and HEAD (plus untracked files)")
    p.add_argument("--no-baseline", action="store_true", help="ignore the baseline: every finding counts as new")
    p.add_argument("--format", choices=FORMATS, default="text", help="report written to standard output (default: text)")
    p.add_argument("--junit", metavar="FILE", help="also write a JUnit XML report (one test case per structure)")
    p.add_argument("--sarif", metavar="FILE", help="also write a SARIF 2.1.0 log")
    p.add_argument("--markdown", metavar="FILE", help="also write a Markdown summary for a pull-request comment")
    p.add_argument("--verbose", "-v", action="store_true", help="text report: list every structure, with its count")
    p.set_defaults(run=run)


def load_config(args):
    """Configuration with the command-line overrides applied."""
    from ..config import load

    cfg = load(args.config)
    if getattr(args, "fail_on", None):
        cfg.fail_on = args.fail_on
    if getattr(args, "unreadable", None):
        cfg.unreadable = args.unreadable
    return cfg


def run(args) -> int:
    from ..config import ConfigError
    from ..gate import EXIT_USAGE, GateError, gate

    try:
        cfg = load_config(args)
        baseline = False if args.no_baseline else args.baseline
        report = gate(cfg, paths=args.paths or None, changed_since=args.changed_since, baseline=baseline)
    except (ConfigError, GateError) as exc:
        print(f"bondcheck gate: {exc}", file=sys.stderr)
        return EXIT_USAGE
    try:
        for fmt, dest in (("junit", args.junit), ("sarif", args.sarif), ("markdown", args.markdown)):
            if dest:
                with open(dest, "w", encoding="utf-8") as fh:
                    fh.write(render(report, fmt))
    except OSError as exc:
        print(f"bondcheck gate: cannot write a report: {exc}", file=sys.stderr)
        return EXIT_USAGE
    sys.stdout.write(render(report, args.format, verbose=args.verbose))
    return report.exit_code


def render(report, fmt: str, verbose: bool = False) -> str:
    if fmt == "junit":
        from ..render.junit import render as r

        return r(report)
    if fmt == "sarif":
        from ..render.sarif import render as r

        return r(report)
    if fmt == "markdown":
        from ..render.markdown import render as r

        return r(report)
    if fmt == "json":
        import json

        from ..render.sarif import _clean

        return json.dumps(_clean(report.to_dict()), indent=2, allow_nan=False) + "\n"
    return render_text(report, verbose=verbose)


def render_text(report, verbose: bool = False) -> str:
    from ..render.text import CAUTION, render_one

    n = report.counts()
    scope = f"changed since {report.changed_since}" if report.changed_since else "selected"
    lines = [
        f"bondcheck gate: {n['structures']} structure(s) in {n['files']} file(s) {scope}; "
        f"fails on {report.fail_on} and above; configuration: {report.config}; "
        f"baseline: {report.baseline_file or 'none'}"
    ]
    if report.filtered:
        lines.append(f"({report.filtered} file(s) left out by include/exclude)")
    lines.append("")
    for c in report.checked:
        if c.unreadable:
            tag = "ERROR" if report.unreadable_mode == "fail" or c.failed else "ok"
            lines.append(f"{tag:5s} {c.file}: {c.error}")
        elif c.failed:
            lines.append(f"FAIL  {c.file} [{c.structure}]")
        elif c.items and not verbose:
            why = sorted({f"accepted: {i.reason}" if i.state == "accepted" else "in the baseline" if i.state == "baseline"
                          else "below fail-on" for i in c.items})
            lines.append(f"ok    {c.file} [{c.structure}] {', '.join(i.slug for i in c.items)} ({'; '.join(why)})")
            continue
        elif verbose:
            lines.append(f"ok    {c.file} [{c.structure}]")
        else:
            continue
        for i in c.items:
            where = f" ({', '.join(i.sites)})" if i.sites else ""
            state = {"new": "NEW" if i.failing else "new, below fail-on", "accepted": f"accepted: {i.reason}",
                     "baseline": "in the baseline"}[i.state]
            lines.append(f"      {i.severity} {i.slug}: {i.message}{where}  [{state}]")
        if verbose and c.result is not None and c.result.status == "ok":
            lines.extend("      " + x for x in render_one(c.result).splitlines()[1:])
    if report.gone:
        lines.append("")
        lines.append(f"{len(report.gone)} baseline entr{'y' if len(report.gone) == 1 else 'ies'} no longer found "
                     "(run 'bondcheck baseline prune'):")
        lines.extend(f"      {e['file']} [{e.get('structure', '')}] {e['finding']}" for e in report.gone)
    if report.unused_acceptances:
        lines.append("")
        lines.append("acceptances that matched nothing: " + "; ".join(report.unused_acceptances))
    lines.append("")
    code = report.exit_code
    verdict = {
        0: "passed",
        1: f"failed: {n['new']} new finding(s) at or above {report.fail_on} in {n['failed_structures']} structure(s)",
        3: f"failed: {n['unreadable']} input(s) could not be read or checked",
    }[code]
    lines.append(
        f"{verdict} (exit {code}); {n['accepted']} accepted, {n['baseline']} in the baseline, "
        f"{sum(not c.failed and not c.unreadable for c in report.checked)} structure(s) clean or quiet"
    )
    lines.append(CAUTION)
    return "\n".join(lines) + "\n"
