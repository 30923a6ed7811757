"""Markdown summary of a gate run, sized for a pull-request comment."""
from __future__ import annotations

MAX_ROWS = 50


def _cell(s) -> str:
    s = " ".join(str(s).split())
    return s.replace("\\", "\\\\").replace("|", "\\|").replace("`", "'").replace("<", "&lt;").replace(">", "&gt;")


def _code(s) -> str:
    return "`" + str(s).replace("`", "'") + "`"


def render(report) -> str:
    from .text import CAUTION

    n = report.counts()
    code = report.exit_code
    if code == 0:
        head = "passed"
    elif code == 1:
        head = f"failed: {n['new']} new finding(s) at or above {report.fail_on}"
    else:
        head = f"failed: {n['unreadable']} input(s) could not be checked"
    out = [f"### bondcheck gate {head}", ""]
    scope = f"changed since {_code(report.changed_since)}" if report.changed_since else "selected by the configuration"
    out.append(
        f"{n['structures']} structure(s) in {n['files']} file(s) {scope}; fails on {_code(report.fail_on)} and above; "
        f"baseline {_code(report.baseline_file) if report.baseline_file else 'none'}."
    )
    out.append("")
    out.append(
        f"| new | accepted | in baseline | unreadable | gone from baseline |\n|---:|---:|---:|---:|---:|\n"
        f"| {n['new']} | {n['accepted']} | {n['baseline']} | {n['unreadable']} | {n['gone']} |"
    )

    failing = report.failing
    if failing:
        out += ["", "#### New findings", "", "| file | structure | finding | severity | sites | message |", "|---|---|---|---|---|---|"]
        for c, i in failing[:MAX_ROWS]:
            out.append(
                f"| {_code(c.file)} | {_cell(c.structure)} | {_code(i.slug)} | {i.severity} | {_cell(', '.join(i.sites))} | {_cell(i.message)} |"
            )
        if len(failing) > MAX_ROWS:
            out.append(f"\n... and {len(failing) - MAX_ROWS} more (see the JUnit or SARIF report).")
        out += ["", "Run `bondcheck explain SLUG` for what a finding means and what to check next."]

    bad = report.unreadable
    if bad:
        out += ["", "#### Could not be checked", ""]
        out += [f"- {_code(c.file)}: {_cell(c.error)}" for c in bad[:MAX_ROWS]]

    quiet = [(c, i) for c in report.checked for i in c.items if i.state != "new"]
    if quiet:
        out += ["", f"<details><summary>{len(quiet)} known finding(s) kept quiet</summary>", ""]
        out += ["| file | structure | finding | why quiet |", "|---|---|---|---|"]
        for c, i in quiet[:MAX_ROWS]:
            why = f"accepted: {i.reason}" if i.state == "accepted" else "in the baseline"
            out.append(f"| {_code(c.file)} | {_cell(c.structure)} | {_code(i.slug)} | {_cell(why)} |")
        out += ["", "</details>"]

    if report.gone:
        out += ["", f"<details><summary>{len(report.gone)} baseline entr{'y' if len(report.gone) == 1 else 'ies'} "
                "no longer found (run <code>bondcheck baseline prune</code>)</summary>", ""]
        out += [f"- {_code(e['file'])} {_cell(e.get('structure', ''))}: {_code(e['finding'])}" for e in report.gone[:MAX_ROWS]]
        out += ["", "</details>"]
    if report.unused_acceptances:
        out += ["", "Acceptances that matched nothing: " + "; ".join(_code(a) for a in report.unused_acceptances)]
    out += ["", f"_{CAUTION}_", ""]
    return "\n".join(out)
