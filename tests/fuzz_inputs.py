"""Hostile variants of real CIF files, for tests/test_fuzz.py and tools/fuzz_campaign.py.

The seeds are files from outside the project: ase's bundled COD mineral CIFs
(ase/test/testdata/minerals) and pymatgen's bundled structures
(pymatgen/util/structures) written as CIF by pymatgen's CifWriter.

A mutation is a function of the seed's bytes and a ``random.Random``; the
same generator state gives the same bytes, so every input of a run can be
made again from its seed name and a number (``make(name, number)``).  They
work at three levels: bytes (flips, cuts, control bytes, encodings), tokens
(numbers, element symbols, operators, space-group names swapped for
awkward ones) and structure (lines and blocks repeated, dropped or joined,
loops blown up, cells scaled).
"""
from __future__ import annotations

import random
import re
import warnings
from functools import lru_cache
from pathlib import Path

__all__ = ["seeds", "mutate", "make", "MUTATORS"]


@lru_cache(maxsize=1)
def seeds() -> dict[str, bytes]:
    """Seed CIFs by name, in a fixed order."""
    import ase
    import pymatgen.util
    from pymatgen.core import Structure
    from pymatgen.io.cif import CifWriter

    out: dict[str, bytes] = {}
    minerals = Path(ase.__file__).parent / "test" / "testdata" / "minerals"
    for p in sorted(minerals.glob("*.cif")):
        out[p.name] = p.read_bytes()
    structures = Path(pymatgen.util.__file__).parent / "structures"
    for p in sorted(structures.glob("*.json")):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            text = str(CifWriter(Structure.from_file(str(p))))
        out[p.stem + ".cif"] = text.encode()
    return out


# -- values that have broken readers before ---------------------------------

NUMBERS = ["0", "-0", "0.0", "1", "-1", "0.5", "1.0000001", "0.9999999", "2", "90", "180", "360",
           "1e308", "-1e308", "1e400", "1e-320", "1e-5", "nan", "inf", "-inf", "NaN",
           "99999999999999999999999", "0.5(3)", "1.23(45)", "(3)", "1(", ".5", "5.", "+", "-",
           "?", ".", "1/3", "0x10", "1_000", "١٢٣", "1e", "e5", "--1", "0.333", "0.3333333"]
SYMBOLS = ["Xx", "D", "T", "Og", "H2O", "OH", "NH4", "Sb3-", "Fe+9", "Fe9+", "C0", "c", "?", ".", "''",
           "Va", "Uue", "Q", "M", "Nb5+", "O2-", "O-2", "Ln", "Cl1-", "S-2", "Zz1", "ÿ"]
OPERATORS = ["'x,y,z'", "'-x,-y,-z'", "'x+1/2,y+1/2,z'", "'2*x,y,z'", "'x,x,x'", "'x+y,y,z'",
             "'x+1/3,y,z+1/7'", "'-y,x-y,z+1/3'", "'z,x,y'", "'x,y'", "'a,b,c'", "'x,y,z,+1'", "'?'",
             "'x+0.5,y,z'", "'1-x,1-y,1-z'", "'x,y,z+100'", "''"]
GROUPS = ["'P 1'", "'P -1'", "'F m -3 m'", "'Fm-3m'", "'R 3 :H'", "'R -3 m :R'", "'P 63/m m c'",
          "'I 41/a m d :1'", "'F d -3 m S'", "'P 21/c'", "'P2_1/c'", "'Q 9 9'", "'A b m a'", "''", "?",
          "'P 1 21/c 1'", "'Pnma'", "'C 1 2/c 1'", "'-F 4 2 3'", "'P 4/n :2'", "'Im-3m'"]
SPACERS = [b"\r\n", b"\r", b"\t", b"\x0b", b"\x0c", b"\x1a", b"\x00", b"\xff", b"\xef\xbb\xbf",
           b"\xc3\xa9", b"'", b'"', b";", b"#", b"loop_", b"data_", b"_", b"\n;\n", b"\\", b"\x85", b"\xe2\x80\xa8"]
BANNERS = [b"Copyright (c) 2031 Kestrel Lab, all rights reserved\n", b"(C) sample archive\n",
           b"\xef\xbb\xbf", b"\n\n\n", b"global_\n_audit_creation_method 'x'\n", b"junk 'unbalanced\n"]

_TOKEN = re.compile(rb"\S+")
_NUMBER = re.compile(rb"^[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?(?:\(\d+\))?$")


def _tokens(data: bytes) -> list[tuple[int, int]]:
    return [m.span() for m in _TOKEN.finditer(data)]


def _replace_span(data: bytes, span: tuple[int, int], new: bytes) -> bytes:
    return data[:span[0]] + new + data[span[1]:]


def _lines(data: bytes) -> list[bytes]:
    return data.split(b"\n")


# -- byte level --------------------------------------------------------------

def flip_bytes(data: bytes, rnd: random.Random) -> bytes:
    b = bytearray(data)
    for _ in range(rnd.randint(1, 8)):
        if b:
            b[rnd.randrange(len(b))] = rnd.randrange(256)
    return bytes(b)


def insert_spacer(data: bytes, rnd: random.Random) -> bytes:
    i = rnd.randrange(len(data) + 1)
    return data[:i] + rnd.choice(SPACERS) + data[i:]


def cut(data: bytes, rnd: random.Random) -> bytes:
    """Truncate, or drop a stretch from the middle."""
    if rnd.random() < 0.5:
        return data[:rnd.randrange(len(data) + 1)]
    i = rnd.randrange(len(data) + 1)
    return data[:i] + data[i + rnd.randint(1, 200):]


def repeat_stretch(data: bytes, rnd: random.Random) -> bytes:
    i = rnd.randrange(len(data) + 1)
    j = min(len(data), i + rnd.randint(1, 300))
    return data[:j] + data[i:j] * rnd.randint(1, 5) + data[j:]


def encoding(data: bytes, rnd: random.Random) -> bytes:
    kind = rnd.randrange(6)
    if kind == 0:
        return data.replace(b"\n", b"\r\n")
    if kind == 1:
        return data.replace(b"\n", b"\r")
    if kind == 2:
        return data.decode("latin-1").encode("utf-16")
    if kind == 3:
        return data.decode("latin-1").encode("utf-16-le")
    if kind == 4:
        return b"\xef\xbb\xbf" + data
    return data + b"\n_publ_section_title 'Caf\xe9 \xa9'\n"


def banner(data: bytes, rnd: random.Random) -> bytes:
    return rnd.choice(BANNERS) + data


# -- token level -------------------------------------------------------------

def swap_number(data: bytes, rnd: random.Random) -> bytes:
    spans = [s for s in _tokens(data) if _NUMBER.match(data[s[0]:s[1]])]
    if not spans:
        return data
    for _ in range(rnd.randint(1, 3)):
        s = rnd.choice(spans)
        data = _replace_span(data, s, rnd.choice(NUMBERS).encode())
        spans = [t for t in _tokens(data) if _NUMBER.match(data[t[0]:t[1]])] or [s]
    return data


def swap_symbol(data: bytes, rnd: random.Random) -> bytes:
    spans = [s for s in _tokens(data) if re.fullmatch(rb"[A-Z][a-z]?\d*[+-]?\d*", data[s[0]:s[1]])]
    if not spans:
        return data
    return _replace_span(data, rnd.choice(spans), rnd.choice(SYMBOLS).encode("utf-8"))


def swap_operator(data: bytes, rnd: random.Random) -> bytes:
    spans = [m.span() for m in re.finditer(rb"'[^'\n]*[xyz][^'\n]*,[^'\n]*'", data)]
    if not spans:
        return data
    return _replace_span(data, rnd.choice(spans), rnd.choice(OPERATORS).encode())


def swap_group(data: bytes, rnd: random.Random) -> bytes:
    m = re.search(rb"(_symmetry_space_group_name_H-M|_space_group_name_H-M_alt|_space_group_name_Hall)"
                  rb"[ \t]+(\S.*)", data)
    if not m:
        return data
    return _replace_span(data, m.span(2), rnd.choice(GROUPS).encode())


def shuffle_tokens(data: bytes, rnd: random.Random) -> bytes:
    """Delete, repeat or exchange tokens: loops with values missing or extra."""
    spans = _tokens(data)
    if len(spans) < 2:
        return data
    a, b = sorted(rnd.sample(spans, 2))
    kind = rnd.randrange(3)
    ta, tb = data[a[0]:a[1]], data[b[0]:b[1]]
    if kind == 0:
        return _replace_span(data, a, b"")
    if kind == 1:
        return _replace_span(data, a, ta + b" " + ta)
    return data[:a[0]] + tb + data[a[1]:b[0]] + ta + data[b[1]:]


# -- structure level ---------------------------------------------------------

def lines(data: bytes, rnd: random.Random) -> bytes:
    ls = _lines(data)
    i = rnd.randrange(len(ls))
    kind = rnd.randrange(4)
    if kind == 0:
        del ls[i]
    elif kind == 1:
        ls.insert(i, ls[i])
    elif kind == 2:
        j = rnd.randrange(len(ls))
        ls[i], ls[j] = ls[j], ls[i]
    else:  # drop every line with this tag or value in it
        word = (ls[i].split() or [b"_cell"])[0]
        ls = [x for x in ls if word not in x]
    return b"\n".join(ls)


def blocks(data: bytes, rnd: random.Random) -> bytes:
    kind = rnd.randrange(3)
    if kind == 0:
        return data + b"\n" + data  # the same block twice, same name
    if kind == 1:
        other = rnd.choice(list(seeds().values()))
        return data + b"\n" + other
    return b"data_empty\n_cell_length_a 5\n\n" + data


def blow_up_atoms(data: bytes, rnd: random.Random) -> bytes:
    """Repeat the rows of the atom-site loop: duplicated sites, or many sites."""
    ls = _lines(data)
    rows = [i for i, x in enumerate(ls) if re.match(rb"\s*[A-Za-z]+\w*\s+\S+\s+[-\d.(]+\s+[-\d.(]+\s+[-\d.(]+", x)
            and not x.lstrip().startswith((b"_", b"#", b"'"))]
    if not rows:
        return data
    k = rnd.choice([2, 3, 10, 200])
    i = rnd.choice(rows)
    return b"\n".join(ls[:i + 1] + [ls[i]] * k + ls[i + 1:])


def scale_cell(data: bytes, rnd: random.Random) -> bytes:
    spans = [m.span(1) for m in re.finditer(rb"_cell_(?:length_[abc]|angle_(?:alpha|beta|gamma))[ \t]+(\S+)", data)]
    if not spans:
        return data
    s = rnd.choice(spans)
    value = data[s[0]:s[1]].split(b"(")[0]
    try:
        x = float(value)
    except ValueError:
        return data
    factor = rnd.choice([0.0, 0.001, 0.1, 0.5, 2.0, 10.0, 1000.0, -1.0])
    return _replace_span(data, s, repr(x * factor).encode())


ELEMENTS = ("H He Li Be B C N O F Ne Na Mg Al Si P S Cl Ar K Ca Sc Ti V Cr Mn Fe Co Ni Cu Zn Ga Ge As Se "
            "Br Kr Rb Sr Y Zr Nb Mo Tc Ru Rh Pd Ag Cd In Sn Sb Te I Xe Cs Ba La Ce Pr Nd Pm Sm Eu Gd Tb Dy "
            "Ho Er Tm Yb Lu Hf Ta W Re Os Ir Pt Au Hg Tl Pb Bi Po At Rn Fr Ra Ac Th Pa U Np Pu Am Cm Bk Cf "
            "Es Fm Md No Lr").split()


def element_soup(data: bytes, rnd: random.Random) -> bytes:
    """Put another element (any of 1-103) wherever one element's symbol stands
    as a whole token: chemistry the later stages rarely see."""
    found = sorted({m.group(1) for m in re.finditer(rb"(?<=\s)([A-Z][a-z]?)(?=[\d+-]*\s)", data)
                    if m.group(1).decode() in ELEMENTS})
    if not found:
        return data
    old = rnd.choice(found)
    new = rnd.choice(ELEMENTS).encode()
    return re.sub(rb"(?<=\s)" + old + rb"(?=[\d+-]*\s)", new, data)


def occupancies(data: bytes, rnd: random.Random) -> bytes:
    """Give the sites of the atom loop random partial occupancies (adding the
    column when it is missing)."""
    ls = _lines(data)
    tags = [i for i, x in enumerate(ls) if x.strip().startswith(b"_atom_site_")]
    if not tags:
        return data
    start = tags[0]
    end = start
    while end + 1 < len(ls) and ls[end + 1].strip().startswith(b"_atom_site_"):
        end += 1
    names = [ls[i].strip() for i in range(start, end + 1)]
    out = ls[:end + 1]
    col = names.index(b"_atom_site_occupancy") if b"_atom_site_occupancy" in names else None
    if col is None:
        out.append(b"_atom_site_occupancy")
    i = end + 1
    while i < len(ls) and ls[i].strip() and not ls[i].lstrip().startswith((b"_", b"loop_", b"#")):
        parts = ls[i].split()
        value = rnd.choice([b"0.5", b"0.25", b"0.999", b"0.001", b"0.33", b"1"])
        if col is not None and col < len(parts):
            parts[col] = value
        elif col is None:
            parts.append(value)
        out.append(b" ".join(parts))
        i += 1
    return b"\n".join(out + ls[i:])


MUTATORS = [flip_bytes, insert_spacer, cut, repeat_stretch, encoding, banner, swap_number, swap_symbol,
            swap_operator, swap_group, shuffle_tokens, lines, blocks, blow_up_atoms, scale_cell, element_soup,
            occupancies]


def mutate(data: bytes, rnd: random.Random, rounds: int | None = None) -> bytes:
    """Apply one to three mutations chosen by ``rnd``."""
    for _ in range(rounds if rounds is not None else rnd.randint(1, 3)):
        data = rnd.choice(MUTATORS)(data, rnd)
    return data


def make(name: str, number: int) -> bytes:
    """Input ``number`` of the campaign grown from seed ``name``."""
    return mutate(seeds()[name], random.Random(f"{name}:{number}"))
