"""Plain-text report for people: the count written out, a per-site table,
the findings and the verdict."""
from __future__ import annotations

from typing import Iterable

CAUTION = (
    "A consistent count does not prove a structure right: the diffraction data, "
    "the refinement and the crystallographer decide."
)

VERDICT_WORDS = {
    "consistent": "consistent: the electron count closes",
    "mismatch": "mismatch: the electron count does not close",
    "not-applicable": "not-applicable: nothing to count",
}


def _f(x, nd=2) -> str:
    if x is None:
        return "-"
    if isinstance(x, float):
        return f"{x:.{nd}f}"
    return str(x)


def _table(headers: list[str], rows: list[list[str]]) -> list[str]:
    widths = [max(len(h), *(len(r[k]) for r in rows)) if rows else len(h) for k, h in enumerate(headers)]
    line = "  ".join(h.ljust(w) for h, w in zip(headers, widths))
    out = [line.rstrip(), "  ".join("-" * w for w in widths)]
    for r in rows:
        out.append("  ".join(c.rjust(w) if k >= 2 else c.ljust(w) for k, (c, w) in enumerate(zip(r, widths))).rstrip())
    return out


def render_one(r) -> str:
    lines = [f"== {r.path}"]
    if r.status != "ok":
        lines.append(f"   error: {r.error}")
        return "\n".join(lines)
    lines.append(f"   {r.formula}   space group {r.spacegroup or 'not determined (--no-symmetry)'}")
    lines.append(f"   verdict: {VERDICT_WORDS.get(r.verdict, r.verdict)}" + (f"  [{', '.join(r.causes)}]" if r.causes else ""))
    if r.anions:
        lines.append(f"   split: cations {' '.join(r.cations) or '-'} | anions {' '.join(r.anions)}")
        lines.append(f"          ({r.partition})")
        lines.append("   count (per anion):")
        lines.append(
            f"     VEC_A = {_f(r.electrons_per_formula)} valence electrons / {_f(r.anions_per_formula)} anions = {_f(r.vec_anion, 3)}"
        )
        note = "(with CC = 0)"
        if r.aa_predicted is not None and r.aa_predicted < 0:
            note = f"(negative: cations must keep at least {_f(-r.aa_predicted, 3)} electrons per anion)"
        lines.append(f"     predicted anion-anion bonds AA = 8 - VEC_A = {_f(r.aa_predicted, 3)} {note}")
        lines.append(f"     observed  AA = {_f(r.aa_observed, 3)}   CC (electrons in cation-cation bonds) = {_f(r.cc_observed, 3)}")
        lines.append(f"     residual = VEC_A - 8 + AA - CC = {_f(r.residual, 3)} electrons per anion")
    if getattr(r, "polyanion", ""):
        lines.append(f"   anion substructure: {r.polyanion}")
    headers = ["site", "el", "wyck", "occ", "role", "bonds", "coord", "charge", "nearest", "last in", "first out", "gap"]
    rows = []
    for s in r.sites:
        rows.append(
            [
                s["label"],
                s["element"],
                f"{s['multiplicity'] or ''}{s['wyckoff'] or ''}" or "-",
                _f(s["occupancy"], 3).rstrip("0").rstrip(".") if s["occupancy"] != 1 else "1",
                s["role"] or "-",
                _f(s["bonds"]),
                _f(s["coordination"]),
                _f(s["formal_charge"]),
                _f(s["nearest"], 3),
                _f(s["last_bonded"], 3),
                _f(s["first_unbonded"], 3) + ("*" if s["fragile"] else ""),
                _f(s["gap"], 3),
            ]
        )
    lines.append("   sites (bonds: anion-anion for anions, cation-cation for cations; ratios d/(r_i+r_j); * count fragile):")
    lines.extend("     " + x for x in _table(headers, rows))
    if r.findings:
        lines.append("   findings (most likely cause first; 'bondcheck explain SLUG' says more):")
        for f in r.findings:
            d = f.to_dict() if hasattr(f, "to_dict") else f
            where = f" ({', '.join(d['sites'])})" if d["sites"] else ""
            lines.append(f"     {d['severity']:7s} {d['slug']}: {d['message']}{where}")
    return "\n".join(lines)


def render(results: Iterable) -> str:
    results = list(results)
    parts = [render_one(r) for r in results]
    tally: dict[str, int] = {}
    for r in results:
        key = r.verdict if r.status == "ok" else "error"
        tally[key] = tally.get(key, 0) + 1
    summary = ", ".join(f"{v} {k}" for k, v in sorted(tally.items()))
    parts.append(f"{len(results)} structure(s): {summary}\n{CAUTION}")
    return "\n\n".join(parts) + "\n"
