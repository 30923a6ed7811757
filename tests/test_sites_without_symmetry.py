"""Options(symmetry=False): sites grouped by environment instead of by spglib.

References: the structures pymatgen ships (pymatgen/util/structures) and the
corpus at ../shared/corpus (skipped when absent), each checked with the
default spglib grouping; the fast grouping must give the same count and may
only merge spglib sites (atoms of one orbit always share an environment).
"""
from pathlib import Path

import numpy as np
import pytest

from bondcheck.api import Options, check, check_all
from bondcheck.bonds import find_contacts
from bondcheck.read import read
from bondcheck.symmetry import find_sites, group_sites

from .conftest import PMG_STRUCTURES

FAST = Options(symmetry=False)
COUNT_KEYS = ("status", "verdict", "anions", "cations", "vec_anion", "aa_predicted", "aa_observed", "cc_observed", "residual")


def _coarser_or_equal(fine: np.ndarray, coarse: np.ndarray) -> bool:
    """Every group of `fine` lies within one group of `coarse`."""
    pairs = set(zip(fine.tolist(), coarse.tolist()))
    return len(pairs) == len(set(fine.tolist()))


@pytest.mark.parametrize("name", sorted(p.name for p in PMG_STRUCTURES.glob("*.json")))
def test_bundled_structures_count_the_same(name):
    path = PMG_STRUCTURES / name
    a = check(path)
    b = check(path, options=FAST)
    assert [getattr(b, k) for k in COUNT_KEYS] == [getattr(a, k) for k in COUNT_KEYS]
    assert b.spacegroup == "" and a.spacegroup
    assert all(s["wyckoff"] is None and s["multiplicity"] is None for s in b.sites)
    cr = read(path)[0]
    assert _coarser_or_equal(find_sites(cr).site, group_sites(cr, find_contacts(cr)).site)


@pytest.mark.parametrize(
    "name,n_sites",
    [
        # spglib on pymatgen's bundled files: LiFePO4 P2_1/c, 8 (site, element)
        # rows; Li10GeP2S12 P4_2/nmc, 9; TlBiSe2 P4/mmm, 16; NaFePO4 Pnma, 6.
        ("LiFePO4.json", 8),
        ("Li10GeP2S12.json", 9),
        ("TlBiSe2.json", 16),
        ("NaFePO4.json", 6),
    ],
)
def test_grouping_finds_the_crystallographic_sites(name, n_sites):
    assert len(check(PMG_STRUCTURES / name).sites) == n_sites
    assert len(check(PMG_STRUCTURES / name, options=FAST).sites) == n_sites


def test_graphite_sites_alike_up_to_the_contact_range_merge():
    # AB graphite (pymatgen's Graphite.json, P6_3/mmc): C on 2b and 2c differ
    # only in the stacking, 3.35 A away, beyond every contact the bond stage
    # keeps; the fast grouping makes them one site with the same row values.
    a = check(PMG_STRUCTURES / "Graphite.json")
    b = check(PMG_STRUCTURES / "Graphite.json", options=FAST)
    assert len(a.sites) == 2 and len(b.sites) == 1
    assert b.sites[0]["bonds"] == a.sites[0]["bonds"] == a.sites[1]["bonds"] == 3


def test_options_key_marks_the_mode():
    assert Options().key() != FAST.key()
    assert FAST.key().startswith(Options().key())


def test_corpus_sample_counts_the_same(corpus):
    files = sorted((corpus / "prototypes").glob("*.cif"))[::10] + sorted((corpus / "mp-relaxed").glob("*.cif"))[::60]
    slow = check_all(files)
    fast = check_all(files, options=FAST)
    assert len(slow) == len(fast) == len(files)
    merged = 0
    for a, b in zip(slow, fast):
        assert [getattr(b, k) for k in COUNT_KEYS] == [getattr(a, k) for k in COUNT_KEYS], a.path
        merged += len(b.sites) < len(a.sites)
        assert len(b.sites) <= len(a.sites), a.path
    # Merges are the exception (about 9 % of the corpus).
    assert merged < 0.2 * len(files)


def test_corpus_sample_never_splits_an_orbit(corpus):
    files = sorted((corpus / "mp-relaxed").glob("*.cif"))[::25]
    for f in files:
        cr = read(Path(f))[0]
        assert _coarser_or_equal(find_sites(cr).site, group_sites(cr, find_contacts(cr)).site), f
