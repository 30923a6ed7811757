"""Regenerate docs/findings.md from the finding types in bondcheck/findings.py.

    python tools/make_findings_doc.py
"""
from pathlib import Path

from bondcheck.findings import all_findings

HEADER = """# Findings

Every finding bondcheck reports, generated from `bondcheck/findings.py` by
`tools/make_findings_doc.py` (a test keeps this file in step). `bondcheck explain SLUG`
prints the same text. Severities: `info` (context or an explanation of a closed count),
`warning` (something probably needs a look), `error` (the model is very likely wrong).
A finding's severity may be raised or lowered case by case (an electron-deficient cluster
whose count closes is `info`, one that does not close is `warning`).

A consistent count does not prove a structure right: the diffraction data, the refinement and
the crystallographer decide.
"""


def render() -> str:
    parts = [HEADER]
    for slug, cls in sorted(all_findings().items()):
        parts.append(
            f"## `{slug}` ({cls.severity})\n\n**{cls.title}.** {cls.meaning}\n\n"
            f"*Fires when:* {cls.fires_when}\n\n*Check next:* {cls.next_steps}\n"
        )
    return "\n".join(parts)


def main() -> None:
    out = Path(__file__).resolve().parents[1] / "docs" / "findings.md"
    out.write_text(render())
    print(f"wrote {out}")


if __name__ == "__main__":
    main()
