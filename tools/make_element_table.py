"""Regenerate bondcheck/data/elements.json from ase and pymatgen element data.

The package reads the table at run time instead of importing pymatgen, which
takes about a second to import. tests/test_elements.py checks the table still
agrees with both libraries.

    python tools/make_element_table.py
"""
import json
from pathlib import Path

from ase.data import chemical_symbols, covalent_radii
from pymatgen.core.periodic_table import Element


def main() -> None:
    rows = {}
    for z in range(1, 104):
        sym = chemical_symbols[z]
        el = Element(sym)
        x = el.X
        rows[sym] = {
            "Z": z,
            "radius": round(float(covalent_radii[z]), 3),
            "pauling": None if x != x else round(float(x), 2),
            "group": int(el.group),
            "row": int(el.row),
            "block": el.block,
            "common_ox": sorted(int(o) for o in el.common_oxidation_states),
            "icsd_ox": sorted(int(o) for o in el.icsd_oxidation_states),
            "all_ox": sorted(int(o) for o in el.oxidation_states),
        }
    out = Path(__file__).resolve().parents[1] / "bondcheck" / "data" / "elements.json"
    out.write_text(json.dumps(rows, indent=0, sort_keys=False) + "\n")
    print(f"wrote {len(rows)} elements to {out}")


if __name__ == "__main__":
    main()
