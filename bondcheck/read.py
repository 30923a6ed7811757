"""Read crystal structures into :class:`~bondcheck.record.Crystal` records.

CIF files go through gemmi's CIF tokenizer and a small numpy symmetry
expansion written for speed; every other format is handed to ase (POSCAR,
CONTCAR, extended XYZ, ...) or pymatgen (Structure JSON), imported lazily so
that ``import bondcheck.read`` stays cheap.

Whatever goes wrong, the public functions raise :class:`StructureError` with a
one-line message meant for users.  Inputs over the limits of
:mod:`bondcheck.limits` (file size, atoms per cell) are turned away before the
expensive work, and so are cells no crystal has (docs/limits.md).
"""
from __future__ import annotations

import json
import math
import os
import re
from functools import lru_cache
from pathlib import Path
from typing import Iterator, NamedTuple

import gemmi
import numpy as np

from . import limits
from .arrays import filled
from .record import Crystal, StructureError

__all__ = ["read", "read_blocks", "iter_structure_files", "read_cif_bytes", "species", "cell_matrix",
           "Crystal", "StructureError"]

# Images of one site closer than this (angstrom) are one atom (a site on a
# special position).  Coordinates written with three or four digits put
# such images up to a few hundredths of an angstrom apart; distinct images
# of real sites (split positions of disordered atoms) are 0.3 angstrom or more
# apart.  Closer images are kept and left to the bond stage to report.
MERGE_TOL = 0.1
OCC_TOL = 1e-3
# Occupancies are refined to two or three decimals; a smaller one is a slip
# (or a value made to divide by).
MIN_OCCUPANCY = 1e-4
# Squared lengths are summed as products with this (d @ _ONES3): numpy's
# sum over an axis of three is several times slower on (n, m, 3) arrays.
_ONES3 = np.ones(3)

# What no crystal does; beyond these the input is wrong (or hostile) and the
# later stages would spend minutes on it.  Common practice, no source:
# interplanar spacings of a unit cell's faces are an angstrom or more, the
# densest solids (diamond, 0.18 atoms per cubic angstrom) stay well below
# MAX_DENSITY, and cell edges of inorganic crystals stay below a few hundred
# angstrom.
MIN_WIDTH = 0.5           # angstrom, the smallest distance between opposite faces of the cell
MAX_LENGTH = 1e5          # angstrom, a cell edge
MAX_DENSITY = 1.0         # atoms (occupancy-weighted) per cubic angstrom
MAX_ENTRY_DENSITY = 4.0   # entries (split and mixed sites counted each) per cubic angstrom
MAX_FRACTIONAL = 1e3      # a fractional coordinate, before wrapping into the cell

_ELEMENTS = (
    "H He Li Be B C N O F Ne Na Mg Al Si P S Cl Ar K Ca Sc Ti V Cr Mn Fe Co Ni "
    "Cu Zn Ga Ge As Se Br Kr Rb Sr Y Zr Nb Mo Tc Ru Rh Pd Ag Cd In Sn Sb Te I "
    "Xe Cs Ba La Ce Pr Nd Pm Sm Eu Gd Tb Dy Ho Er Tm Yb Lu Hf Ta W Re Os Ir Pt "
    "Au Hg Tl Pb Bi Po At Rn Fr Ra Ac Th Pa U Np Pu Am Cm Bk Cf Es Fm Md No Lr "
    "Rf Db Sg Bh Hs Mt Ds Rg Cn Nh Fl Mc Lv Ts Og"
).split()
_Z = {sym: z for z, sym in enumerate(_ELEMENTS, start=1)}
_Z["D"] = 1  # deuterium
_Z["T"] = 1  # tritium

_CIF_SUFFIXES = (".cif", ".mcif", ".cif.gz", ".mcif.gz")
_VASP_SUFFIXES = (".vasp", ".poscar")
_XYZ_SUFFIXES = (".xyz", ".extxyz")
_STRUCTURE_SUFFIXES = _CIF_SUFFIXES + _VASP_SUFFIXES + _XYZ_SUFFIXES + (".json",)
_VASP_PREFIXES = ("POSCAR", "CONTCAR")


# --------------------------------------------------------------------------
# public API
# --------------------------------------------------------------------------

def read(source, *, block: str | None = None, max_bytes: int | None = None,
         max_atoms: int | None = None) -> list[Crystal]:
    """Read one structure source into a list of crystals.

    ``source`` is a path (str or Path), a pymatgen ``Structure``/``IStructure``,
    an ase ``Atoms`` or a :class:`Crystal` (returned as is).  A CIF file gives
    one crystal per data block holding atom sites; ``block`` selects one of
    them by name.  Anything that cannot be read raises :class:`StructureError`.

    ``max_bytes`` (file size, uncompressed) and ``max_atoms`` (atoms in one
    unit cell) override the limits in force (:mod:`bondcheck.limits`); an
    input over a limit is turned away before the expensive work.
    """
    lim = limits.current()
    if max_bytes is not None or max_atoms is not None:
        lim = lim.but(max_bytes=max_bytes, max_atoms=max_atoms)
    try:
        if isinstance(source, Crystal):
            crystals = [source]
        elif isinstance(source, (str, os.PathLike)):
            return _read_path(os.fspath(source), block, lim)
        else:
            crystals = _read_object(source)
            for c in crystals:
                limits.check_atoms(c.natoms, lim.max_atoms)
                _check_plausible(c)
        return _select(crystals, block)
    except StructureError:
        raise
    except MemoryError:
        raise StructureError("out of memory while reading (lower the limits or give more memory)") from None
    except RecursionError:
        raise StructureError("cannot read structure: nested too deeply") from None
    except Exception as exc:  # a last guard: callers only ever see StructureError
        raise StructureError(
            f"cannot read structure ({type(exc).__name__}: {_one_line(exc, 100)})") from exc


def iter_structure_files(path) -> Iterator[Path]:
    """Yield the structure files under ``path`` (recursively, sorted).

    Files are recognised by name: ``*.cif``, ``*.mcif``, ``*.cif.gz``,
    ``POSCAR*``, ``CONTCAR*``, ``*.vasp``, ``*.poscar``, ``*.xyz``,
    ``*.extxyz`` and ``*.json`` (pymatgen Structure).  Hidden files and
    directories are skipped.  A file path is yielded as is.
    """
    root = Path(os.fspath(path))
    if root.is_file():
        yield root
        return
    if not root.is_dir():
        raise StructureError(f"no such file or directory: {root}")
    found = []
    for dirpath, dirnames, filenames in os.walk(root):
        dirnames[:] = [d for d in dirnames if not d.startswith(".")]
        rel = Path(dirpath).relative_to(root).parts
        found.extend(rel + (fname,) for fname in filenames if _is_structure_name(fname))
    found.sort()  # by path components, as a sorted listing of the tree reads
    for parts in found:
        yield root.joinpath(*parts)


_NOT_STRUCTURES = ("README", "LICENSE", "LICENCE", "COPYING", "CHANGELOG")


def _is_structure_name(fname: str) -> bool:
    if fname.startswith(".") or fname.upper().startswith(_NOT_STRUCTURES):
        return False
    if fname.startswith(_VASP_PREFIXES):
        return True
    return fname.lower().endswith(_STRUCTURE_SUFFIXES)


def _select(crystals: list[Crystal], block: str | None) -> list[Crystal]:
    if block is None:
        return crystals
    chosen = [c for c in crystals if c.name == block]
    if not chosen:
        chosen = [c for c in crystals if c.name.lower() == block.lower()]
    if not chosen:
        names = ", ".join(c.name for c in crystals) or "none"
        raise StructureError(f"no data block named '{block}' (found: {names})")
    return chosen


def _one_line(text: str, limit: int = 160) -> str:
    text = " ".join(str(text).split())
    return text if len(text) <= limit else text[: limit - 3] + "..."


# --------------------------------------------------------------------------
# files
# --------------------------------------------------------------------------

def _read_path(path: str, block: str | None, lim: limits.Limits) -> list[Crystal]:
    lname = os.path.basename(path).lower()
    if lname.endswith(_CIF_SUFFIXES):
        return _cif_crystals(_read_bytes(path, lim.max_bytes), path, block, lim, keep_going=False)
    if lname.endswith((".json", ".json.gz")):
        crystals = _read_pymatgen_json(Path(path), lim.max_bytes)
    elif not (os.path.basename(path).startswith(_VASP_PREFIXES)
              or lname.endswith(_VASP_SUFFIXES + _XYZ_SUFFIXES)):
        data = _read_bytes(path, lim.max_bytes)
        if _looks_like_cif(data):
            return _cif_crystals(data, path, block, lim, keep_going=False)
        crystals = _read_with_ase(Path(path), lim, data)
    else:
        crystals = _read_with_ase(Path(path), lim)
    for c in crystals:
        limits.check_atoms(c.natoms, lim.max_atoms)
        _check_plausible(c)
    return _select(crystals, block)


def _read_bytes(path, max_bytes: int) -> bytes:
    """The file's bytes (gunzipped for ``*.gz``), read in chunks up to the limit.

    The file is read through its descriptor (:func:`limits.read_file`),
    which costs less than a Python file object.
    """
    try:
        data = limits.read_file(path, max_bytes)
    except FileNotFoundError:
        raise StructureError(f"no such file: {path}") from None
    except IsADirectoryError:
        raise StructureError(f"{path} is a directory, not a structure file") from None
    except OSError as exc:
        raise StructureError(f"cannot read file: {exc.strerror or exc}") from None
    if str(path).lower().endswith(".gz"):
        data = limits.gunzip_capped(data, max_bytes)
    return data


_CIF_START = re.compile(rb"\A(?:\s*#[^\n]*\n)*\s*data_", re.IGNORECASE)


def _looks_like_cif(data: bytes) -> bool:
    return bool(_CIF_START.match(data[:65536].lstrip(b"\xef\xbb\xbf")))


# bytes that never occur in a text file (everything below 0x20 except the
# whitespace characters tab, newline, vertical tab, form feed, return; DEL;
# 0x1a is the DOS end-of-file mark, tolerated)
_CONTROL = bytes([*range(0, 9), *range(14, 26), *range(27, 32), 127])


def _decode(data: bytes) -> str:
    if data[:2] in (b"\xff\xfe", b"\xfe\xff"):
        try:
            return data.decode("utf-16")
        except UnicodeDecodeError:
            raise StructureError("binary file: not a text file (bad UTF-16)") from None
    n_control = len(data) - len(data.translate(None, _CONTROL))
    if b"\x00" in data or n_control > 8 + len(data) // 200:
        raise StructureError("binary file: contains non-text bytes")
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError:
        # a stray non-UTF-8 byte (usually an accented name in a comment or a
        # publication field) should not cost us the structure
        text = data.decode("latin-1")
    if text.startswith("\ufeff"):
        text = text[1:]
    if "\r" in text and "\n" not in text:
        # classic Mac OS line ends: gemmi ends comments at '\n' only
        text = text.replace("\r", "\n")
    return text


# --------------------------------------------------------------------------
# CIF
# --------------------------------------------------------------------------

_GEMMI_POS = re.compile(r"^string:(\d+)(?::\d+)?(?:\(\d+\))?:?\s*")


def _cif_syntax_error(exc: Exception, text: str = "") -> StructureError:
    msg = _one_line(exc)
    m = _GEMMI_POS.match(msg)
    where = ""
    low = msg.lower()
    if m:
        where = f" (line {m.group(1)})"
        msg = msg[m.end():]
    elif msg.startswith("string:"):
        msg = msg[len("string:"):].lstrip()
    inside = re.match(r"in data_(\S*): (.+)", msg)
    if inside:  # 'in data_x: duplicate tag _y', 'in data_x: _y has no value'
        msg = f"{inside.group(2)} in data block '{inside.group(1)}'"
    elif msg == "parse error" and m and text:
        # gemmi says no more; show the line it stopped at
        lines = text.split("\n", int(m.group(1)))
        line = lines[int(m.group(1)) - 1] if len(lines) >= int(m.group(1)) else ""
        snippet = line.strip()
        if snippet:
            shown = repr(snippet[:40] + ("..." if len(snippet) > 40 else ""))
            msg = f"cannot make sense of {shown}"
    if "wrong number of values in loop" in low:
        kind = "truncated CIF or broken loop"
        where = where.replace("(line", "(loop at line")
    elif "unterminated" in low:
        kind = "truncated CIF"
    elif "expected block header" in low:
        kind = "not a CIF file"
    else:
        kind = "invalid CIF"
    msg = msg[:1].lower() + msg[1:]
    return StructureError(f"{kind}: {msg}{where}")


def read_cif_bytes(data: bytes, source: str = "", *, block: str | None = None,
                   max_bytes: int | None = None, max_atoms: int | None = None) -> list[Crystal]:
    """Read CIF content (bytes or str) into one crystal per block with atoms.

    A block that cannot be read makes the whole call fail (the message names
    the block); :func:`read_blocks` keeps the good blocks instead.
    """
    out = _cif_crystals(data, source, block, limits.current().but(max_bytes=max_bytes, max_atoms=max_atoms),
                        keep_going=False)
    return out  # type: ignore[return-value]


def read_blocks(source, *, block: str | None = None, max_bytes: int | None = None,
                max_atoms: int | None = None) -> list[Crystal | StructureError]:
    """Like :func:`read`, but a file with several data blocks gives one item per
    block: the crystal, or the :class:`StructureError` of a block that cannot be
    read (its ``source`` attribute is ``path#block``), so that one bad block
    does not cost the others.  Errors of the file as a whole still raise.
    """
    lim = limits.current().but(max_bytes=max_bytes, max_atoms=max_atoms)
    if isinstance(source, (str, os.PathLike)):
        path = os.fspath(source)
        lname = os.path.basename(path).lower()
        try:
            if lname.endswith(_CIF_SUFFIXES):
                return _cif_crystals(_read_bytes(path, lim.max_bytes), path, block, lim, keep_going=True)
            if not (lname.endswith((".json", ".json.gz") + _VASP_SUFFIXES + _XYZ_SUFFIXES)
                    or os.path.basename(path).startswith(_VASP_PREFIXES)):
                data = _read_bytes(path, lim.max_bytes)
                if _looks_like_cif(data):
                    return _cif_crystals(data, path, block, lim, keep_going=True)
        except StructureError:
            raise
        except MemoryError:
            raise StructureError("out of memory while reading (lower the limits or give more memory)") from None
        except Exception as exc:
            raise StructureError(
                f"cannot read structure ({type(exc).__name__}: {_one_line(exc, 100)})") from exc
    return list(read(source, block=block, max_bytes=lim.max_bytes, max_atoms=lim.max_atoms))


def _parse_cif(text: str) -> tuple[object, dict]:
    """gemmi's document for the text, after mending the slips that are common
    in files from the wild; the notes say what was mended."""
    notes: dict = {}
    repairs = 0
    level = 1  # gemmi's checks: 1 rejects repeated tags, 0 lets them through
    duplicate_error = None
    while True:
        try:
            doc = gemmi.cif.read_string(text, level)
        except Exception as exc:  # gemmi raises ValueError/RuntimeError on syntax errors
            fixed = None
            if repairs < _MAX_REPAIRS:
                fixed = _close_quote(text, exc)
                if fixed is not None:
                    notes["quote_repairs"] = notes.get("quote_repairs", 0) + 1
                elif "preamble_lines" not in notes:
                    fixed, n = _skip_preamble(text, exc)
                    if fixed is not None:
                        notes["preamble_lines"] = n
                if fixed is None and "renamed_blocks" not in notes:
                    fixed, renamed = _rename_duplicate_blocks(text, exc)
                    if fixed is not None:
                        notes["renamed_blocks"] = renamed
                if fixed is None and level and "duplicate tag" in str(exc):
                    level, duplicate_error, fixed = 0, exc, text
            if fixed is None:
                raise _cif_syntax_error(exc, text) from None
            text = fixed
            repairs += 1
            continue
        if duplicate_error is not None:
            repeated = _repeated_tags(doc)
            if any(t.startswith(_READ_PREFIXES) and not t.startswith(_ANISO) for t in repeated):
                raise _cif_syntax_error(duplicate_error, text) from None
            notes["repeated_tags"] = repeated[:10]
        return doc, notes


# Tags the reader uses: repeated with other values, they would make the
# structure ambiguous.  Any other tag may repeat (a publication field, a
# database code written twice): the first value stands, as gemmi finds it.
_READ_PREFIXES = ("_cell_length", "_cell.length", "_cell_angle", "_cell.angle", "_atom_site", "_symmetry",
                  "_space_group", "_atom_type")
_ANISO = ("_atom_site_aniso", "_atom_site.aniso", "_atom_site_anisotrop")


def _repeated_tags(doc) -> list[str]:
    out: list[str] = []
    for i in range(len(doc)):
        seen: set[str] = set()
        for item in doc[i]:
            if item.pair is not None:
                tags = [item.pair[0]]
            elif item.loop is not None:
                tags = list(item.loop.tags)
            else:
                continue
            for t in tags:
                t = t.lower()
                if t in seen and t not in out:
                    out.append(t)
                seen.add(t)
    return out


def _cif_crystals(data, source: str, block: str | None, lim: limits.Limits,
                  keep_going: bool) -> list:
    limits.check_size(len(data), lim.max_bytes, "CIF content")
    text = data if isinstance(data, str) else _decode(data)
    if not text.strip(" \t\r\n\x0b\x0c\x1a"):
        raise StructureError("empty file")
    doc, notes = _parse_cif(text)
    if len(doc) == 0:
        raise StructureError("not a CIF file: no data_ block")

    # the blocks with atom sites, each with its first atom-site column
    if len(doc) == 1:  # (the usual case, without the lists)
        b = doc[0]
        column = _atom_column(b)
        blocks = [] if column is None else [(b, column)]
    else:
        all_blocks = [doc[i] for i in range(len(doc))]  # (indexing is cheaper than iterating)
        blocks = [(b, column) for b, column in zip(all_blocks, map(_atom_column, all_blocks)) if column is not None]
    if block is not None:
        wanted = [bc for bc in blocks if bc[0].name == block] or [
            bc for bc in blocks if bc[0].name.lower() == block.lower()]
        if not wanted:
            names = ", ".join(b.name for b, _ in blocks) or "none with atoms"
            raise StructureError(f"no data block named '{block}' (found: {names})")
        blocks = wanted
    if not blocks:
        if len(doc) == 1:
            raise StructureError(f"no atom sites in data block '{doc[0].name}'")
        raise StructureError(f"no atom sites in any of the {len(doc)} data blocks")

    several = len(blocks) > 1 or len(doc) > 1
    crystals: list = []
    for b, column in blocks:
        src = f"{source}#{b.name}" if several else source
        try:
            try:
                c = _crystal_from_block(b, column, src, lim.max_atoms)
            except StructureError:
                raise
            except MemoryError:
                raise StructureError("out of memory while reading this block") from None
            except Exception as exc:  # anything unforeseen still becomes a StructureError
                raise StructureError(
                    f"unreadable CIF block ({type(exc).__name__}: {_one_line(exc, 100)})") from None
        except StructureError as exc:
            err = StructureError(f"data block '{b.name}': {exc}") if several else exc
            if not (keep_going and several):
                raise err from None
            err.source = src
            crystals.append(err)
            continue
        c.meta.update(notes)
        crystals.append(c)
    return crystals


_MAX_REPAIRS = 20
_UNTERMINATED = re.compile(r"^string:(\d+)\S*\s+unterminated ('|\")string")


def _close_quote(text: str, exc: Exception) -> str | None:
    """Mend a quoted value that never closes on its line.

    CIF 1.1 closes a quote only before white space, so a publication field
    such as  'K. Schubert',  runs on to the end of the file.  Programs that
    write such lines mean the quote to close on the same line; closing it at
    the end of that line keeps the value count of the loop intact.
    Returns None when the error is of another kind or the line is not found.
    """
    m = _UNTERMINATED.match(str(exc))
    if not m:
        return None
    lineno, q = int(m.group(1)), m.group(2)
    lines = text.split("\n")
    if not 0 < lineno <= len(lines):
        return None
    line = lines[lineno - 1].rstrip()
    i, n = 0, len(line)
    while i < n:
        ch = line[i]
        if ch in " \t":
            i += 1
        elif ch == "#":
            return None
        elif ch in "'\"":
            j = i + 1
            while j < n and not (line[j] == ch and (j + 1 == n or line[j + 1] in " \t")):
                j += 1
            if j >= n:  # this quote never closes
                if ch != q:
                    return None
                lines[lineno - 1] = line + q
                return "\n".join(lines)
            i = j + 1
        else:
            while i < n and line[i] not in " \t":
                i += 1
    return None


_BLOCK_HEADER = re.compile(r"^[ \t]*(?:data_|global_)", re.IGNORECASE | re.MULTILINE)


def _skip_preamble(text: str, exc: Exception) -> tuple[str | None, int]:
    """Comment out lines before the first block header.

    Some databases and programs put a copyright or banner line without '#'
    at the top of a file.  When gemmi stops there, the lines before the first
    ``data_`` become comments (so line numbers stay as they are).
    Returns (None, 0) when the error is of another kind or there is no header.
    """
    if "expected block header" not in str(exc):
        return None, 0
    m = _BLOCK_HEADER.search(text)
    if m is None or m.start() == 0:
        return None, 0
    head = text[:m.start()].split("\n")
    n = 0
    for k, line in enumerate(head[:-1]):
        if line.strip() and not line.lstrip().startswith("#"):
            head[k] = "#" + line
            n += 1
    if n == 0:
        return None, 0
    return "\n".join(head) + text[m.start():], n


_DATA_HEADER = re.compile(r"^([ \t]*data_)(\S*)", re.IGNORECASE | re.MULTILINE)


def _rename_duplicate_blocks(text: str, exc: Exception) -> tuple[str | None, list[str]]:
    """Give repeated block names (files written by concatenation) a suffix:
    the second 'data_x' becomes 'data_x_2'.  Block names are case-insensitive."""
    if "duplicate block name" not in str(exc):
        return None, []
    seen: set[str] = set()
    renamed: list[str] = []

    def fix(m: re.Match) -> str:
        name = m.group(2)
        key = name.lower()
        if key not in seen:
            seen.add(key)
            return m.group(0)
        k = 2
        while f"{key}_{k}" in seen:
            k += 1
        new = f"{name}_{k}"
        seen.add(new.lower())
        renamed.append(new)
        return m.group(1) + new

    fixed = _DATA_HEADER.sub(fix, text)
    return (fixed, renamed) if renamed else (None, [])


_ATOM_KEYS = ("_atom_site_fract_x", "_atom_site.fract_x", "_atom_site_label",
              "_atom_site.label", "_atom_site_type_symbol", "_atom_site.type_symbol")


def _atom_column(block):
    """The block's first atom-site column of _ATOM_KEYS (gemmi's Column), or
    None when the block has no atom sites."""
    for key in _ATOM_KEYS:
        col = block.find_values(key)
        if col:
            return col
    return None


def _atom_loop(block, column) -> tuple[tuple[str, ...], list[str]]:
    """The atom-site tags and the flat list of values; ``column`` is the
    block's :func:`_atom_column`.  A loop's tags come as written, those of
    single key-value pairs (one atom) in lower case with underscores, the
    form :func:`_site_columns` makes of both."""
    loop = column.get_loop()
    if loop is not None:
        return tuple(loop.tags), loop.values
    # atom sites given as single key-value pairs (one atom)
    tags, values = [], []
    for item in block:
        pair = item.pair
        if pair is not None:
            tag = pair[0].lower().replace("_atom_site.", "_atom_site_", 1)
            if tag.startswith("_atom_site_") and not tag.startswith("_atom_site_aniso"):
                tags.append(tag)
                values.append(pair[1])
    return tuple(tags), values


@lru_cache(maxsize=1024)
def _site_columns(tags: tuple[str, ...]) -> tuple[tuple[int | None, ...], bool]:
    """Where the columns of _SITE_TAGS are among an atom-site loop's tags
    (None for those absent), and whether Cartesian coordinates are given.
    Files from one program share their tags, so this is worked out once."""
    col = {t.lower().replace("_atom_site.", "_atom_site_", 1): i for i, t in enumerate(tags)}
    return tuple(map(col.get, _SITE_TAGS)), "_atom_site_cartn_x" in col


def _unquote(v: str) -> str:
    if v and v[0] in "'\";":
        return gemmi.cif.as_string(v)
    return v


def _is_null(v: str) -> bool:
    """Whether a value is '?' or '.' (unknown, not applicable), quoted or not.
    (Unquoting keeps a part of the value, so one without '?' and '.' is
    settled without it.)"""
    return ("?" in v or "." in v) and _unquote(v).strip() in ("?", ".")


def _num(v: str) -> float:
    """A CIF number: '1.234(5)' -> 1.234; '?', '.' -> nan."""
    try:
        return float(v)
    except ValueError:
        pass
    v = _unquote(v).strip()
    i = v.find("(")
    if i > 0 and v.endswith(")"):
        v = v[:i]
    try:
        return float(v)
    except ValueError:
        return math.nan


def _floats(values: list[str]) -> np.ndarray:
    """CIF numbers to an array; '?' and '.' become nan."""
    try:
        return np.array(list(map(float, values)), dtype=np.float64)
    except ValueError:
        table = {v: _num(v) for v in set(values)}
        return np.array([table[v] for v in values], dtype=np.float64)


def _find_value(block, tags) -> str | None:
    for tag in tags:
        v = block.find_value(tag)
        if v is not None:
            return v
    return None


def _find_column(block, tags) -> list[str]:
    for tag in tags:
        col = block.find_values(tag)
        if col:
            return [col[i] for i in range(len(col))]  # (iterating a Column is slow)
    return []


_CELL_KEYS = ("length_a", "length_b", "length_c", "angle_alpha", "angle_beta", "angle_gamma")
_CELL_TAGS = tuple(("_cell_" + k, "_cell." + k, k.replace("_", " ")) for k in _CELL_KEYS)


def _cif_cell(block) -> list[float]:
    find = block.find_value
    try:  # the usual case: six plain numbers
        return [float(find("_cell_length_a")), float(find("_cell_length_b")),
                float(find("_cell_length_c")), float(find("_cell_angle_alpha")),
                float(find("_cell_angle_beta")), float(find("_cell_angle_gamma"))]
    except (TypeError, ValueError):  # absent, '?', uncertainties, dotted tags
        pass
    params = []
    for i, (tag, dotted, what) in enumerate(_CELL_TAGS):
        v = block.find_value(tag)
        if v is None:
            v = block.find_value(dotted)
        x = math.nan if v is None else _num(v)
        if x != x:  # nan: absent, '?', '.', or not a number
            if i >= 3 and (v is None or _unquote(v) in ("?", ".")):
                x = 90.0  # a missing angle is 90 degrees by the CIF dictionary
            elif v is None or _unquote(v) in ("?", "."):
                raise StructureError(f"no unit cell: {tag} missing")
            else:
                raise StructureError(f"unit cell {what} is not a number: {_unquote(v)!r}")
        params.append(x)
    return params


def cell_matrix(a: float, b: float, c: float,
                alpha: float, beta: float, gamma: float) -> np.ndarray:
    """Lattice vectors as rows: a along x, b in the xy plane, right handed."""
    if not (0 < a < math.inf and 0 < b < math.inf and 0 < c < math.inf):
        name, x = next((k, v) for k, v in zip("abc", (a, b, c)) if not 0 < v < math.inf)
        raise StructureError(f"bad unit cell: length {name} = {x:g} is not positive")
    if max(a, b, c) > MAX_LENGTH:
        name, x = next((k, v) for k, v in zip("abc", (a, b, c)) if v > MAX_LENGTH)
        raise StructureError(f"bad unit cell: length {name} = {x:g} A is implausibly long "
                             f"(over {MAX_LENGTH:g} A)")
    if not (0 < alpha < 180 and 0 < beta < 180 and 0 < gamma < 180):
        name, x = next((k, v) for k, v in zip(("alpha", "beta", "gamma"), (alpha, beta, gamma))
                       if not 0 < v < 180)
        raise StructureError(f"impossible cell angle: {name} = {x:g} degrees")
    # exact zeros for right angles, so that orthogonal cells come out clean
    ca = 0.0 if alpha == 90.0 else math.cos(math.radians(alpha))
    cb = 0.0 if beta == 90.0 else math.cos(math.radians(beta))
    if gamma == 90.0:
        cg, sg = 0.0, 1.0
    else:
        cg, sg = math.cos(math.radians(gamma)), math.sin(math.radians(gamma))
    cy = (ca - cb * cg) / sg
    cz2 = 1.0 - cb * cb - cy * cy
    if cz2 <= 1e-8:
        raise StructureError(
            f"impossible cell angles alpha={alpha:g}, beta={beta:g}, gamma={gamma:g}: "
            "the cell has no volume")
    return np.array([[a, 0.0, 0.0],
                     [b * cg, b * sg, 0.0],
                     [c * cb, c * cy, c * math.sqrt(cz2)]])


def _check_widths(cell: np.ndarray) -> tuple[float, list[float]]:
    """The volume of a cell and its widths; reject a cell that is nearly flat.

    The width across each pair of opposite faces is V / |face|; a width
    below MIN_WIDTH means atoms sit on top of their own periodic images (and
    makes a neighbour search visit an enormous number of images).
    """
    (ax, ay, az), (bx, by, bz), (cx, cy, cz) = cell.tolist()
    sqrt, isfinite = math.sqrt, math.isfinite
    fa = sqrt((by * cz - bz * cy) ** 2 + (bz * cx - bx * cz) ** 2 + (bx * cy - by * cx) ** 2)  # |b x c|
    fb = sqrt((cy * az - cz * ay) ** 2 + (cz * ax - cx * az) ** 2 + (cx * ay - cy * ax) ** 2)  # |c x a|
    fc = sqrt((ay * bz - az * by) ** 2 + (az * bx - ax * bz) ** 2 + (ax * by - ay * bx) ** 2)  # |a x b|
    vol = abs(ax * (by * cz - bz * cy) - ay * (bx * cz - bz * cx) + az * (bx * cy - by * cx))
    if not (vol > 0 and isfinite(vol) and fa > 0 and isfinite(fa) and fb > 0 and isfinite(fb)
            and fc > 0 and isfinite(fc)):
        raise StructureError("impossible unit cell: it has no volume")
    widths = [vol / fa, vol / fb, vol / fc]
    w = min(widths)
    if not w >= MIN_WIDTH:
        k = widths.index(w)
        raise StructureError(
            f"impossible unit cell: only {w:.3g} A between the faces across {'abc'[k]} "
            f"(under {MIN_WIDTH:g} A; check the cell angles)")
    return vol, widths


def _check_density(vol: float, occ: np.ndarray, whole: bool = False) -> None:
    """Reject more atoms per volume than any solid holds (lengths in nm, say).
    ``whole``: every occupancy is 1."""
    n = len(occ)
    weighted = float(n) if whole else float(np.add.reduce(occ))  # (occ.sum() without its Python-level wrapper)
    if weighted > MAX_DENSITY * vol or n > MAX_ENTRY_DENSITY * vol:
        raise StructureError(
            f"implausible cell: {weighted:.4g} atoms in {vol:.4g} A^3 ({weighted / vol:.3g} per A^3, "
            "solids hold at most about 0.2; lengths in nm instead of A?)")


def _check_plausible(c: Crystal) -> None:
    """The checks of a CIF's cell, for crystals from other formats and objects."""
    if c.natoms:
        vol, _ = _check_widths(c.cell)
        _check_density(vol, c.occupancy)


# ---- elements and charges -------------------------------------------------

_SPECIES_RE = re.compile(r"([A-Za-z]+)(.*)")
_CHARGE_RE = re.compile(r"(\d*(?:\.\d+)?)([+-])|([+-])(\d*(?:\.\d+)?)|\d*")


def _parse_charge(rest: str) -> float | None:
    """'3-' -> -3.0, '+' -> 1.0, '-2' -> -2.0, '' or '1' -> nan; None if no charge form."""
    m = _CHARGE_RE.fullmatch(rest)
    if m is None:
        return None
    mag1, sign1, sign2, mag2 = m.groups()
    sign, mag = (sign1, mag1) if sign1 else (sign2, mag2)
    if not sign:
        return math.nan  # bare digits: a numbered type such as 'Fe1', no charge
    q = float(mag) if mag else 1.0
    return -q if sign == "-" else q


@lru_cache(maxsize=4096)
def species(symbol: str, strict: bool = True) -> tuple[int, float]:
    """Atomic number and formal charge of a CIF type symbol or site label.

    'Sb3-' -> (51, -3.0); 'Fe' -> (26, nan); 'FE2+' -> (26, 2.0); 'D' -> (1, nan).
    With ``strict`` (type symbols) the symbol must be an element symbol,
    optionally followed by a charge or a number: 'Xx', 'Va', 'OH', 'H2O' and
    'NH4' give (0, nan).  Without it (labels such as 'Ow1', 'Fe2a', 'SB1')
    the leading letters name the element and no charge is read.
    Returns (0, nan) when no element is found.
    """
    m = _SPECIES_RE.match(symbol.strip())
    if not m:
        return 0, math.nan
    letters, rest = m.groups()
    z = 0
    if len(letters) >= 2:
        z = _Z.get(letters[0].upper() + letters[1].lower(), 0)
        if z > 100 and letters[1].isupper():
            z = 0  # 'NH4', 'NO3': a molecular group, not nihonium or nobelium
        if z:
            rest = letters[2:] + rest
        elif strict and letters[1].islower():
            return 0, math.nan
    if not z:
        z = _Z.get(letters[0].upper(), 0)
        rest = letters[1:] + rest
    if not z:
        return 0, math.nan
    if not strict:
        return z, math.nan
    q = _parse_charge(rest)
    if q is None:
        return 0, math.nan
    return z, q


# ---- symmetry -------------------------------------------------------------

_SYMOP_TAGS = ("_symmetry_equiv_pos_as_xyz", "_space_group_symop_operation_xyz",
               "_space_group_symop.operation_xyz", "_symmetry_equiv.pos_as_xyz")
_MAGN_OP_TAGS = ("_space_group_symop_magn_operation.xyz", "_space_group_symop.magn_operation_xyz")
_MAGN_CEN_TAGS = ("_space_group_symop_magn_centering.xyz", "_space_group_symop.magn_centering_xyz")
_HM_TAGS = ("_symmetry_space_group_name_H-M", "_space_group_name_H-M_alt",
            "_space_group.name_H-M_alt", "_symmetry.space_group_name_H-M",
            "_space_group_magn.name_BNS", "_space_group_magn.name_bns")
_HALL_TAGS = ("_space_group_name_Hall", "_space_group.name_Hall",
              "_symmetry_space_group_name_Hall", "_symmetry.space_group_name_Hall")
_NUMBER_TAGS = ("_space_group_IT_number", "_space_group.IT_number",
                "_symmetry_Int_Tables_number", "_symmetry.Int_Tables_number")

_DEN = 24  # gemmi's denominator for symmetry operations
_MAX_OPS = 192  # operations of the largest space groups (F m -3 m and others), lattice translations aside


def _encode(rot: np.ndarray, tran: np.ndarray) -> np.ndarray:
    """Integer key of each operation (rotation entries in -2..2, translations mod 24)."""
    r = (rot.reshape(len(rot), 9) + 2) @ (5 ** np.arange(9, dtype=np.int64))
    t = (tran % _DEN) @ np.array([1, _DEN, _DEN * _DEN], dtype=np.int64)
    return r * _DEN ** 3 + t


class _Group(NamedTuple):
    rot: np.ndarray      # (m, 3, 3) rotation parts, identity first
    tran: np.ndarray     # (m, 3) translation parts in [0, 1)
    table: np.ndarray    # (m, m) index of the product of operations i and j
    completed: bool      # operations had to be added to close the group
    # (3, 3m) the rotations side by side, transposed: row x of ``frac @ ops``
    # holds the rotated images of site x, operation after operation
    ops: np.ndarray
    # the images :func:`_expand` keeps of a site, by the site's stabiliser
    # (its row of operations that leave it in place, as bytes); filled as met
    kept: dict


def _group(ops: list[gemmi.Op]) -> _Group:
    """The space group the operations generate."""
    rot = np.array([op.rot for op in ops], dtype=np.int64)
    tran = np.array([op.tran for op in ops], dtype=np.int64).reshape(-1, 3) % _DEN
    if np.any(rot % _DEN):
        raise StructureError("bad symmetry operator: rotation part is not integral")
    rot = (rot // _DEN).reshape(-1, 3, 3)
    if np.any(np.abs(rot) > 2):
        raise StructureError("bad symmetry operator: unusual rotation part")
    keys = _encode(rot, tran)
    _, first = np.unique(keys, return_index=True)
    first.sort()
    rot, tran, keys = rot[first], tran[first], keys[first]
    n_given = len(keys)
    if n_given > _MAX_OPS:
        raise StructureError(f"{n_given} different symmetry operations: more than a space group "
                             f"has ({_MAX_OPS})")
    for _ in range(8):
        r2 = np.einsum("iab,jbc->ijac", rot, rot).reshape(-1, 3, 3)
        t2 = (np.einsum("iab,jb->ija", rot, tran) + tran[:, None, :]).reshape(-1, 3) % _DEN
        if np.any(np.abs(r2) > 2):
            raise StructureError("symmetry operators do not form a space group")
        k2 = _encode(r2, t2)
        new = ~np.isin(k2, keys)
        if not new.any():
            break
        k_new, idx = np.unique(k2[new], return_index=True)
        rot = np.concatenate([rot, r2[new][idx]])
        tran = np.concatenate([tran, t2[new][idx]])
        keys = np.concatenate([keys, k_new])
        if len(keys) > _MAX_OPS:
            raise StructureError("symmetry operators do not form a space group")
    else:
        raise StructureError("symmetry operators do not form a space group")
    ident = _encode(np.eye(3, dtype=np.int64)[None], np.zeros((1, 3), dtype=np.int64))[0]
    order = np.argsort(keys != ident, kind="stable")
    rot, tran, keys = rot[order], tran[order], keys[order]
    # product table: table[i, j] is the index of operation i applied after j
    r2 = np.einsum("iab,jbc->ijac", rot, rot).reshape(-1, 3, 3)
    t2 = (np.einsum("iab,jb->ija", rot, tran) + tran[:, None, :]).reshape(-1, 3) % _DEN
    by_key = np.argsort(keys)
    table = by_key[np.searchsorted(keys[by_key], _encode(r2, t2))].reshape(len(keys), len(keys))
    rot = rot.astype(np.float64)
    group = _Group(rot, tran.astype(np.float64) / _DEN, table, len(keys) != n_given,
                   np.ascontiguousarray(rot.transpose(2, 0, 1).reshape(3, -1)), {})
    for a in (group.rot, group.tran, group.table, group.ops):
        a.setflags(write=False)  # cached and shared between calls
    return group


@lru_cache(maxsize=4096)
def _group_from_triplets(triplets: tuple[str, ...], centerings: tuple[str, ...] = ()):
    if len(triplets) * max(1, len(centerings)) > 8 * _MAX_OPS and \
            len(set(triplets)) * max(1, len(set(centerings))) > _MAX_OPS:
        raise StructureError(f"{len(triplets)} symmetry operators listed: more than a space group has")
    ops = []
    for trip in triplets:
        t = _unquote(trip).strip()
        if t in ("?", "."):
            continue
        if t.count(",") == 3:  # magnetic operation with time reversal
            t = t.rsplit(",", 1)[0]
        try:
            ops.append(gemmi.Op(t))
        except (RuntimeError, ValueError):
            raise StructureError(f"bad symmetry operator: {t!r}") from None
    cens = []
    for trip in centerings:
        t = _unquote(trip).strip()
        if t.count(",") == 3:
            t = t.rsplit(",", 1)[0]
        try:
            cens.append(gemmi.Op(t))
        except (RuntimeError, ValueError):
            raise StructureError(f"bad centering operator: {t!r}") from None
    if cens:
        ops = [c * op for c in cens for op in ops]
    if not ops:
        raise StructureError("no symmetry operators")
    return _group(ops)


@lru_cache(maxsize=1024)
def _group_from_spacegroup(xhm: str):
    sg = gemmi.find_spacegroup_by_name(xhm)
    return _group(list(sg.operations()))


@lru_cache(maxsize=1024)
def _group_from_hall(hall: str):
    try:
        gops = gemmi.symops_from_hall(hall)
    except (RuntimeError, ValueError):
        raise StructureError(f"unknown Hall symbol {hall!r}") from None
    return _group(list(gops))


def _symmetry(block, alpha: float, gamma: float):
    """Candidate symmetry groups for a block and a description for meta.

    Returns ([(group, setting), ...], hm_name, how).  More than
    one candidate only when just a space-group name is given and the group has
    two origin choices.
    """
    hm = _find_value(block, _HM_TAGS)
    hm = _unquote(hm).strip() if hm is not None else ""
    if hm in ("?", "."):
        hm = ""

    triplets = _find_column(block, _SYMOP_TAGS)
    centerings: list[str] = []
    if not triplets:
        triplets = _find_column(block, _MAGN_OP_TAGS)
        if triplets:
            centerings = _find_column(block, _MAGN_CEN_TAGS)
    if triplets and not (len(triplets) == 1 and _is_null(triplets[0])):
        return [(_group_from_triplets(tuple(triplets), tuple(centerings)), "")], hm, "operators"

    hall = _find_value(block, _HALL_TAGS)
    hall = _unquote(hall).strip() if hall is not None else ""
    if hall and hall not in ("?", "."):
        return [(_group_from_hall(hall), "")], hm, "hall"

    how = "hm"
    if not hm:
        number = _find_value(block, _NUMBER_TAGS)
        if number is None or _is_null(number):
            return [(_group_from_triplets(("x,y,z",)), "P 1")], "", "none"
        try:
            sg = gemmi.find_spacegroup_by_number(int(_num(number)))
        except (RuntimeError, ValueError, OverflowError):
            sg = None
        if sg is None:
            raise StructureError(f"unknown space group number {_unquote(number)!r}") from None
        name, how = sg.hm, "number"
    else:
        name = hm
    settings = []
    for prefer in ("2", "1"):
        sg = _find_spacegroup(name, alpha, gamma, prefer)
        if sg is not None and sg.xhm() not in settings:
            settings.append(sg.xhm())
    if not settings:
        if how == "hm":  # a Hall symbol under the name's tag
            try:
                return [(_group_from_hall(name), "")], hm, "hall"
            except StructureError:
                pass
        raise StructureError(f"unknown space group {name!r} and no symmetry operators")
    return [(_group_from_spacegroup(x), x) for x in settings], hm, how


_ORIGIN_SUFFIX = re.compile(r"[\s:]*(?:\b([SZ])|origin\s*(?:choice\s*)?([12]))\s*$", re.IGNORECASE)


def _find_spacegroup(name: str, alpha: float, gamma: float, prefer: str):
    """gemmi's table entry for a space-group name, or None.

    Besides what gemmi understands, subscripts written with '_' ('P2_1/c')
    and the origin suffixes S (first origin) and Z (second origin, at the
    centre of inversion) are accepted.
    """
    m = _ORIGIN_SUFFIX.search(name)
    if m:
        choice = m.group(2) or ("1" if m.group(1).upper() == "S" else "2")
        name = name[:m.start()].strip() + ":" + choice
    for candidate in (name, name.replace("_", "")):
        try:
            sg = gemmi.find_spacegroup_by_name(candidate, alpha, gamma, prefer)
        except (RuntimeError, ValueError):
            sg = None
        if sg is not None:
            return sg
    return None


# ---- symmetry expansion ---------------------------------------------------

def _expand(frac: np.ndarray, cell: np.ndarray, group: _Group,
            inside: bool = False) -> tuple[np.ndarray, np.ndarray | None, np.ndarray | None]:
    """All images of the sites in the unit cell.

    Returns the positions, for each the index of its site, and the images of
    each site under each operation before merging and wrapping, (n, m, 3)
    (both None when the group is the identity alone and positions are the
    sites themselves).  ``inside`` tells that all coordinates are already in
    [0, 1).

    Images g x and h x of a site x are one atom when h^-1 g x is within
    MERGE_TOL of x, that is when g lies in the coset h S of the site's
    stabiliser S; of each coset the image with the lowest index is kept.
    """
    n, m = len(frac), len(group.rot)
    if m == 1:  # the identity alone (P 1)
        return (frac if inside else _wrap(frac)), None, None
    pos, stab = _images(frac, cell, group)
    # Sites kept in place by more than the identity (the first operation).
    # (ufuncs and methods: numpy's function wrappers cost more than the work)
    special = np.logical_or.reduce(stab[:, 1:], axis=1).nonzero()[0]
    if len(special) == 0:  # all sites on general positions
        return _wrap(pos.reshape(n * m, 3)), np.arange(n).repeat(m), pos
    keep = np.ones((n, m), dtype=bool)
    for i in special.tolist():
        keep[i] = _kept_images(group, stab[i])
    return _wrap(pos[keep]), keep.nonzero()[0], pos


def _images(frac: np.ndarray, cell: np.ndarray, group: _Group) -> tuple[np.ndarray, np.ndarray]:
    """The images of the sites under each operation, (n, m, 3), and which
    operations keep each site in place (within MERGE_TOL), (n, m)."""
    pos = (frac @ group.ops).reshape(len(frac), len(group.rot), 3)
    pos += group.tran
    d = pos - frac[:, None, :]
    d -= np.rint(d)
    d = d @ cell
    d *= d
    return pos, d @ _ONES3 < MERGE_TOL ** 2


_MAX_KEPT = 64  # stabilisers remembered per group (the few a corpus meets; memory stays small)


def _kept_images(group: _Group, stab: np.ndarray) -> np.ndarray:
    """Of a site's images under each operation g, those :func:`_expand` keeps:
    g is the lowest index in its coset g S (S the operations in ``stab``)."""
    key = stab.tobytes()
    kept = group.kept.get(key)
    if kept is None:
        kept = group.table[:, stab].min(1) == np.arange(len(stab))
        kept.setflags(write=False)
        if len(group.kept) < _MAX_KEPT:
            group.kept[key] = kept
    return kept


def _count_images(frac: np.ndarray, cell: np.ndarray, group: _Group) -> int:
    """How many atoms :func:`_expand` would give, counted in chunks of sites so
    that a huge cell is turned away without building it: a site whose images
    fall together in groups of k (its site-symmetry order) gives m / k atoms."""
    m = len(group.rot)
    step = max(1, 2_000_000 // (3 * m))
    total = 0
    for s in range(0, len(frac), step):
        k = _images(frac[s:s + step], cell, group)[1].sum(1)
        total += int(np.ceil(m / np.maximum(k, 1)).sum())
    return total


# Squared distance beyond which no pair of :func:`_duplicates` is within
# MERGE_TOL: the margin (1e-6 A) is far above the rounding differences between
# its two computations of the same distances (all pairs at once, then the
# pairs of one element), so the quick test never decides otherwise than the
# full one.
_APART = (MERGE_TOL + 1e-6) ** 2
_STEPS = np.array([[-1], [0], [1]])
_FEW = 64  # up to this many atoms, every pair is looked at


@lru_cache(maxsize=_FEW + 1)
def _pairs(n: int) -> tuple[np.ndarray, np.ndarray]:
    rows, cols = np.triu_indices(n, 1)
    rows.setflags(write=False)
    cols.setflags(write=False)
    return rows, cols


_FEWER = 16  # up to this many atoms, the pairs' differences by one matrix product


@lru_cache(maxsize=_FEWER + 1)
def _pair_differences(n: int) -> np.ndarray:
    """The matrix that takes n positions to the differences of the pairs of
    _pairs(n), row by row (column minus row): its rows hold one 1 and one -1,
    so each difference is that of the two positions, exactly."""
    rows, cols = _pairs(n)
    m = np.zeros((len(rows), n))
    k = np.arange(len(rows))
    m[k, cols] = 1.0
    m[k, rows] = -1.0
    m.setflags(write=False)
    return m


def _duplicates(pos: np.ndarray, cell: np.ndarray, widths: list[float], numbers: np.ndarray,
                occ: np.ndarray) -> np.ndarray | None:
    """Atoms that repeat an earlier atom of the same element within MERGE_TOL
    when the two together are more than one atom (occupancies summing over 1):
    a site written twice, a P 1 file listing an atom on a cell face and its
    copy on the opposite face, or an atom listed with all its images as well
    as the operators that make them.  Returns a mask of the later copies, or
    None when there are none (the usual case, decided cheaply).

    Nearest images by rounding fractional differences are exact here: two
    atoms within MERGE_TOL are less than MERGE_TOL / MIN_WIDTH = 0.2 apart in
    each fractional coordinate.  Up to _FEW atoms, all pairs are measured at
    once first, whatever their elements (a few numpy calls on small arrays),
    and when none is within MERGE_TOL that settles it; beyond _FEW atoms,
    :func:`_apart_on_grids` settles the usual case, and otherwise the cell is
    cut into bins at least MERGE_TOL wide along each axis, and only atoms in
    the same or neighbouring bins are compared.  ``pos`` are in [0, 1).
    """
    n = len(pos)
    if n < 2:
        return None
    if n <= _FEW:
        if n <= _FEWER:  # (one product with the pairs' differences, fewer numpy calls)
            d = _pair_differences(n) @ pos
        else:
            rows, cols = _pairs(n)
            d = pos.take(cols, 0)
            d -= pos.take(rows, 0)
        d -= np.rint(d)
        d = d @ cell
        d *= d
        if np.minimum.reduce(d @ _ONES3) > _APART:
            return None
        rows, cols = _pairs(n)
        sel = numbers[cols] == numbers[rows]
    else:
        if _apart_on_grids(pos, widths):  # (the usual case, decided cheaply)
            return None
        nb = np.array([max(1, min(int(w / MERGE_TOL), 1 << 20)) for w in widths], dtype=np.int64)
        b = np.minimum((pos * nb).astype(np.int64), nb - 1)
        mult = np.array([nb[1] * nb[2], nb[2], 1], dtype=np.int64)
        key = b @ mult
        # The keys of each atom's bin and the 26 bins around it (27, n): bin
        # offsets -1, 0, 1 along each axis (x slowest), wrapped per axis.
        qa, qb, qc = ((b[:, k] + _STEPS) % nb[k] * mult[k] for k in range(3))
        q = (qa[:, None, None, :] + qb[None, :, None, :] + qc[None, None, :, :]).reshape(27, n)
        sk = np.sort(key)
        # Each atom alone in its bin and the bins around it (the usual case)?
        # The bins on one side suffice (q[14:], the offsets after 0, 0, 0):
        # when B lies in a bin next to A's, A lies in the bin on the other
        # side of B's.
        # (The atoms' keys are looked up among the sorted bin keys: binary
        # searches for n keys in 13 n, cheaper than for 13 n keys in n.)
        if (sk[1:] != sk[:-1]).all():
            near = np.sort(q[14:], axis=None)
            if not (near.take(np.minimum(np.searchsorted(near, sk), near.size - 1)) == sk).any():
                return None
        order = np.argsort(key, kind="stable")  # (sk is key[order])
        lo = np.searchsorted(sk, q, "left")
        cnt = (np.searchsorted(sk, q, "right") - lo).ravel()
        # candidate pairs: each atom with the atoms of its neighbouring bins
        # (with fewer than three bins along an axis a pair may come twice: harmless)
        rows = np.repeat(np.tile(np.arange(n), len(q)), cnt)
        within = np.arange(len(rows)) - np.repeat(np.cumsum(cnt) - cnt, cnt)
        cols = order[np.repeat(lo.ravel(), cnt) + within]
        sel = (cols > rows) & (numbers[cols] == numbers[rows])
    if not sel.any():
        return None
    rows, cols = rows[sel], cols[sel]
    d = pos.take(cols, 0) - pos.take(rows, 0)
    d -= np.rint(d)
    d = d @ cell
    near = (d * d).sum(1) < MERGE_TOL ** 2
    if not near.any():
        return None
    near &= occ[rows] + occ[cols] > 1.0 + OCC_TOL
    if not near.any():
        return None
    dup = np.zeros(n, dtype=bool)
    dup[cols[near]] = True
    return dup


# Bins of :func:`_apart_on_grids`: four times MERGE_TOL across, with a margin
# far above rounding; four grids, shifted by a quarter of a bin each time.
_GRID_BIN = 4 * MERGE_TOL * (1 + 1e-3)
_GRID_SHIFTS = (np.arange(4) / 4)[:, None, None]


def _apart_on_grids(pos: np.ndarray, widths: list[float]) -> bool:
    """True when surely no two atoms (``pos`` in [0, 1)) are within MERGE_TOL
    of each other: each atom is alone in its bin in each of four grids.

    Along axis k, two atoms within MERGE_TOL are less than MERGE_TOL / w_k
    apart in that fractional coordinate (w_k the cell's width across it),
    less than a quarter of a bin of these grids: of the four grids, shifted
    by a quarter of a bin each, at most one has a bin boundary between them
    along each axis, so at least one of the four puts them in one bin.
    False means only that the pairs have to be measured (atoms less than
    about three bin widths apart may share a bin)."""
    nb = [max(1, int(w / _GRID_BIN)) for w in widths]
    k = (pos * nb + _GRID_SHIFTS).astype(np.int64)  # (4, n, 3): bins along each axis, grid by grid
    k %= nb
    key = k @ np.array([nb[1] * nb[2], nb[2], 1], dtype=np.int64)
    key.sort(axis=1)
    return not (key[:, 1:] == key[:, :-1]).any()


def _duplicate_sites(frac: np.ndarray, images: np.ndarray, cell: np.ndarray, numbers: np.ndarray,
                     occ: np.ndarray, whole: bool) -> np.ndarray | None:
    """Sites that repeat an earlier site of the same element: the site lies
    within MERGE_TOL of an image of the earlier one (``images`` as
    :func:`_expand` gives them), so that its whole orbit falls on that one's
    (occupancies adding to more than 1, as in :func:`_duplicates`).  A mask
    over the sites, or None.  ``whole``: every occupancy is 1 (any two add
    to more than 1)."""
    rows, cols = _pairs(len(frac))
    # (take and ufunc reductions: fancy indexing and the any() method cost
    # more than the work on these short arrays)
    sel = numbers.take(cols) == numbers.take(rows)
    if not whole:
        sel &= occ.take(rows) + occ.take(cols) > 1.0 + OCC_TOL
    if not np.logical_or.reduce(sel):
        return None
    rows, cols = rows[sel], cols[sel]
    d = images.take(rows, 0)  # (p, m, 3)
    d -= frac.take(cols, 0)[:, None, :]
    d -= np.rint(d)
    d = d @ cell
    d *= d
    near = np.logical_or.reduce(d @ _ONES3 < MERGE_TOL ** 2, axis=1)
    if not np.logical_or.reduce(near):
        return None
    dup = np.zeros(len(frac), dtype=bool)
    dup[cols[near]] = True
    return dup


def _wrap(frac: np.ndarray) -> np.ndarray:
    """Fractional coordinates into [0, 1), C-contiguous."""
    frac = np.subtract(frac, np.floor(frac), order="C")
    # (np.maximum.reduce is frac.max() without its Python-level wrapper)
    if not np.maximum.reduce(frac, axis=None) < 1.0:  # -1e-17 wraps to 1.0 in floating point
        frac[frac >= 1.0] = 0.0
    return frac


def _min_distance(frac: np.ndarray, cell: np.ndarray) -> float:
    """Shortest distance between two atoms (nearest images by rounding)."""
    n = len(frac)
    metric = cell @ cell.T
    best = math.inf
    for s in range(0, n, 256):
        d = frac[s:s + 256, None, :] - frac[None, :, :]
        d -= np.rint(d)
        d2 = np.einsum("...i,ij,...j->...", d, metric, d)
        rows = np.arange(s, min(s + 256, n))
        d2[rows - s, rows] = np.inf
        best = min(best, float(d2.min()))
    return math.sqrt(best)


# ---- one block ------------------------------------------------------------

_SITE_TAGS = ("_atom_site_fract_x", "_atom_site_fract_y", "_atom_site_fract_z", "_atom_site_label",
              "_atom_site_type_symbol", "_atom_site_occupancy", "_atom_site_calc_flag")


def _crystal_from_block(block, column, source: str, max_atoms: int = limits.MAX_ATOMS) -> Crystal:
    """The crystal of one data block; ``column`` is the block's :func:`_atom_column`."""
    tags, values = _atom_loop(block, column)
    ncol = len(tags)
    nrow = len(values) // ncol if ncol else 0
    if nrow == 0:
        raise StructureError("truncated CIF: the atom-site loop has no values")
    where, cartesian = _site_columns(tags)
    xs, ys, zs, labels, types, occ_raw, flags = [None if i is None else values[i::ncol] for i in where]
    if xs is None or ys is None or zs is None:
        if cartesian:
            raise StructureError("only Cartesian atom coordinates given; fractional ones are needed")
        raise StructureError("no fractional atom coordinates (_atom_site_fract_x/y/z)")
    if labels is None:
        if types is None:
            raise StructureError("atom sites have neither labels nor type symbols")
        labels = types

    if flags is not None and any(_unquote(f).lower() == "dum" for f in flags):
        # dummy atoms are not part of the structure
        rows = [i for i, f in enumerate(flags) if _unquote(f).lower() != "dum"]
        if not rows:
            raise StructureError("only dummy atom sites")

        def pick(seq):
            return None if seq is None else [seq[i] for i in rows]
        xs, ys, zs, labels, types, occ_raw = map(pick, (xs, ys, zs, labels, types, occ_raw))
        nrow = len(rows)

    if nrow > max_atoms:  # every site gives at least one atom
        limits.check_atoms(nrow, max_atoms, at_least=True)

    joined = "".join(labels)
    if "'" in joined or '"' in joined or ";" in joined:
        labels = [_unquote(v) for v in labels]

    coords = [""] * (3 * nrow)  # x, y, z of each site in turn
    coords[0::3], coords[1::3], coords[2::3] = xs, ys, zs
    try:
        vals = list(map(float, coords))
        finite = math.isfinite(math.fsum(vals))
    except (ValueError, OverflowError):
        vals = [_num(v) for v in coords]
        finite = all(map(math.isfinite, vals))
    if not finite:
        bad = next(i for i, v in enumerate(vals) if not math.isfinite(v)) // 3
        raise StructureError(f"missing or unreadable coordinates for site '{labels[bad]}'")
    lo, hi = min(vals), max(vals)
    inside = lo >= 0.0 and hi < 1.0
    if not inside and max(-lo, hi) > MAX_FRACTIONAL:
        bad = next(i for i, v in enumerate(vals) if abs(v) > MAX_FRACTIONAL)
        raise StructureError(f"fractional coordinate {vals[bad]:g} of site '{labels[bad // 3]}' "
                             "is far outside the cell")
    frac = np.array(vals).reshape(nrow, 3)

    occ, whole = _occupancies(occ_raw, nrow, labels)
    numbers, charges = _elements(block, types, labels)

    a, b, c, alpha, beta, gamma = _cif_cell(block)
    cell = cell_matrix(a, b, c, alpha, beta, gamma)
    vol, widths = _check_widths(cell)

    candidates, hm, how = _symmetry(block, alpha, gamma)
    m = max([len(group.rot) for group, _ in candidates]) if len(candidates) > 1 else len(candidates[0][0].rot)
    if nrow * m > max_atoms:  # count before expanding
        limits.check_atoms(min(_count_images(frac, cell, group) for group, _ in candidates), max_atoms)
    best = None
    for group, setting in candidates:
        pos, site, images = _expand(frac, cell, group, inside)
        if best is not None:
            # only a space-group name with two origin choices: take the
            # setting that puts more atoms on special positions, then the one
            # that keeps atoms further apart
            if len(pos) > len(best[0]):
                continue
            if len(pos) == len(best[0]) and _min_distance(pos, cell) <= _min_distance(best[0], cell):
                continue
        best = (pos, site, images, setting, group)
    pos, site, images, setting, group = best
    completed, nops = group.completed, len(group.rot)

    labels = np.array(labels)
    # A copy needs two sites of one element (images of one site are merged
    # by the expansion already); most symmetric files have none.  With few
    # sites, sites are compared with the images of the others; otherwise atoms.
    dup = None
    if len(set(numbers.tolist())) < nrow:
        if site is not None and nrow <= _FEW:
            dup = _duplicate_sites(frac, images, cell, numbers, occ, whole)
            dup = None if dup is None else dup[site]
        else:
            dup = False
    if site is not None:
        numbers, occ, labels, charges = numbers[site], occ[site], labels[site], charges[site]
    limits.check_atoms(len(pos), max_atoms)
    meta = {"format": "cif", "spacegroup": hm, "symmetry": how, "nsymops": nops}
    if dup is False:
        dup = _duplicates(pos, cell, widths, numbers, occ)
    if dup is not None:
        keep = ~dup
        meta["merged_duplicates"] = int(dup.sum())
        pos, numbers, occ, labels, charges = pos[keep], numbers[keep], occ[keep], labels[keep], charges[keep]
    _check_density(vol, occ, whole)
    if setting:
        meta["setting"] = setting
    if completed:
        meta["symmetry_completed"] = True
    return Crystal(cell=cell, frac=pos, numbers=numbers, occupancy=occ, labels=labels,
                   charges=charges, name=block.name, source=source, meta=meta)


def _occupancies(occ_raw: list[str] | None, nrow: int, labels: list[str]) -> tuple[np.ndarray, bool]:
    """The sites' occupancies, and whether they are known to be 1 each: the
    same value written for every site, 1 (or within OCC_TOL above) or '?' /
    '.', or no occupancies at all."""
    if occ_raw is None:
        return np.ones(nrow), True
    first = occ_raw[0]
    if occ_raw.count(first) == nrow:  # one value for all sites, usually 1
        v = _num(first)
        if math.isnan(v):
            v = 1.0
        if not MIN_OCCUPANCY <= v <= 1.0 + OCC_TOL:
            _check_occupancy(np.array([v]), labels[:1])
        v = min(v, 1.0)
        return filled(nrow, v), v == 1.0
    occ = _floats(occ_raw)
    occ[np.isnan(occ)] = 1.0  # '?' or '.': not given
    if not (occ.min() >= MIN_OCCUPANCY and occ.max() <= 1.0 + OCC_TOL):
        _check_occupancy(occ, labels)
    return np.minimum(occ, 1.0, out=occ), False


@lru_cache(maxsize=4096)
def _type_species(raw: str) -> tuple[int, float, str]:
    sym = _unquote(raw).strip()
    if sym in ("", "?", "."):
        return 0, math.nan, ""
    z, q = species(sym)
    return z, q, sym


def _elements(block, types: list[str] | None, labels: list[str]) -> tuple[np.ndarray, np.ndarray]:
    """Atomic numbers and formal charges of the asymmetric-unit sites."""
    n = len(labels)
    if types is None:
        znum = {}
        for label in set(labels):
            z, _ = species(label, False)
            if not z:
                raise StructureError(
                    f"cannot tell the element of site '{label}' (no _atom_site_type_symbol)")
            znum[label] = z
        return np.array([znum[v] for v in labels], dtype=np.int64), filled(n, math.nan)

    table = {}
    oxidation = None
    unknown = charged = False
    for t in set(types):
        z, q, sym = _type_species(t)
        if not z:
            unknown = True
        elif q != q:  # no charge in the symbol: perhaps in the _atom_type loop
            if oxidation is None:
                oxidation = _oxidation_numbers(block)
            if sym in oxidation:
                q = oxidation[sym]
                charged = True
        else:
            charged = True
        table[t] = (z, q)
    if unknown:
        rows = []
        for t, label in zip(types, labels):
            z, q = table[t]
            if not z:
                sym = _type_species(t)[2]
                if sym:
                    raise StructureError(f"unknown element symbol '{sym}' (site '{label}')")
                z, q = species(label, False)  # type symbol '?': go by the label
                if not z:
                    raise StructureError(f"cannot tell the element of site '{label}'")
            rows.append((z, q))
        table = dict(enumerate(rows))
        types = range(n)
    numbers = np.array([table[t][0] for t in types], dtype=np.int64)
    if not charged:
        return numbers, filled(n, math.nan)
    return numbers, np.array([table[t][1] for t in types], dtype=np.float64)


def _oxidation_numbers(block) -> dict[str, float]:
    if not (block.find_values("_atom_type_oxidation_number")
            or block.find_values("_atom_type.oxidation_number")):
        return {}
    symbols = _find_column(block, ("_atom_type_symbol", "_atom_type.symbol"))
    numbers = _find_column(block, ("_atom_type_oxidation_number", "_atom_type.oxidation_number"))
    if not symbols or len(symbols) != len(numbers):
        return {}
    out = {}
    for s, q in zip(symbols, numbers):
        q = _num(q)
        if not math.isnan(q):
            out[_unquote(s)] = q
    return out


# --------------------------------------------------------------------------
# other formats (ase, pymatgen), imported lazily
# --------------------------------------------------------------------------

def _read_object(obj) -> list[Crystal]:
    if hasattr(obj, "get_scaled_positions") and hasattr(obj, "pbc"):  # ase Atoms
        return [_from_ase(obj, "", "")]
    if hasattr(obj, "sites") and hasattr(obj, "composition"):  # pymatgen Structure, Molecule
        return [_from_pymatgen(obj, "", "")]
    raise StructureError(f"cannot read an object of type {type(obj).__name__}")


def _read_with_ase(path: Path, lim: limits.Limits, data: bytes | None = None) -> list[Crystal]:
    import ase.io

    lname = path.name.lower()
    fmt = None
    if path.name.startswith(_VASP_PREFIXES) or lname.endswith(_VASP_SUFFIXES):
        fmt = "vasp"
    elif lname.endswith(_XYZ_SUFFIXES):
        fmt = "extxyz"
    if data is None:
        data = _read_bytes(path, lim.max_bytes)
    if not data.strip():
        raise StructureError("empty file")
    _decode(data)  # rejects binary junk with a clear message
    base = lname[:-3] if lname.endswith(".gz") else lname
    if fmt == "vasp" or base.endswith(_VASP_SUFFIXES) or path.name.startswith(_VASP_PREFIXES):
        _check_poscar_counts(data, lim.max_atoms)
    elif base.endswith(_XYZ_SUFFIXES):
        _check_xyz_counts(data, lim.max_atoms)
    try:
        images = ase.io.read(str(path), index=":", format=fmt)
    except StructureError:
        raise
    except Exception as exc:
        what = fmt or "structure"
        raise StructureError(f"cannot read {what} file: {_one_line(exc, 120) or type(exc).__name__}") from None
    if not isinstance(images, list):
        images = [images]
    if not images:
        raise StructureError("no structure in file")
    stem = path.name
    for suffix in (".gz", ".extxyz", ".xyz", ".vasp", ".poscar"):
        if stem.lower().endswith(suffix):
            stem = stem[: -len(suffix)]
    out = []
    for i, atoms in enumerate(images):
        if len(images) == 1:
            out.append(_from_ase(atoms, str(path), stem, fmt or "ase"))
        else:
            out.append(_from_ase(atoms, f"{path}#{i}", f"{stem}#{i}", fmt or "ase"))
    return out


def _ints(line: bytes) -> list[int] | None:
    try:
        return [int(t) for t in line.split()]
    except ValueError:
        return None


def _check_poscar_counts(data: bytes, max_atoms: int) -> None:
    """Turn away a POSCAR whose atom counts exceed the limit or the lines the
    file holds, before ase allocates for them (a count of 10^8 costs ase
    gigabytes and a minute)."""
    lines = data.split(b"\n", 9)
    counts = None
    for k in (5, 6):
        if len(lines) > k:
            counts = _ints(lines[k])
            if counts:
                break
    if not counts:
        return  # let ase say what is wrong
    n = sum(counts)
    limits.check_atoms(n, max_atoms)
    nlines = data.count(b"\n") + 1
    if n > nlines:
        raise StructureError(f"truncated POSCAR: the counts line declares {n:,} atoms, "
                             f"the file has {nlines:,} lines")


def _check_xyz_counts(data: bytes, max_atoms: int) -> None:
    """The same for each frame of an XYZ file: its first line counts its atoms."""
    lines = data.split(b"\n")
    i, n = 0, len(lines)
    while n and not lines[n - 1].strip():
        n -= 1
    while i < n:
        if not lines[i].strip():
            i += 1
            continue
        head = lines[i].split()
        try:
            count = int(head[0])
        except ValueError:
            return  # not a frame header: let ase say what is wrong
        limits.check_atoms(count, max_atoms)
        if i + 2 + count > n:
            raise StructureError(f"truncated XYZ file: a frame declares {count:,} atoms "
                                 f"and {max(0, n - i - 2):,} lines follow")
        i += 2 + count


def _from_ase(atoms, source: str, name: str, fmt: str = "ase") -> Crystal:
    try:
        pbc = np.asarray(atoms.pbc, dtype=bool)
        cell = np.array(atoms.cell, dtype=np.float64)
    except Exception as exc:
        raise StructureError(f"not a usable ase Atoms object: {_one_line(exc, 100)}") from None
    if not pbc.all():
        raise StructureError(f"no periodic cell (periodic in {int(pbc.sum())} of 3 directions)")
    if abs(np.linalg.det(cell)) < 1e-8:
        raise StructureError("no periodic cell (zero cell volume)")
    if len(atoms) == 0:
        raise StructureError("no atoms")
    numbers = np.array(atoms.numbers, dtype=np.int64)
    if (numbers <= 0).any():
        raise StructureError("unknown element (atomic number 0) in structure")
    frac = np.linalg.solve(cell.T, np.asarray(atoms.positions, dtype=np.float64).T).T
    occ = np.ones(len(numbers))
    extra_pos, extra_z, extra_occ = [], [], []
    info = getattr(atoms, "info", {}) or {}
    occ_info = info.get("occupancy")
    if isinstance(occ_info, dict) and occ_info:
        kinds = atoms.arrays.get("spacegroup_kinds")
        if kinds is None:
            tags = atoms.get_tags()
            kinds = tags if any(str(k) in occ_info for k in tags) else np.arange(len(numbers))
        symbols = atoms.get_chemical_symbols()
        for i, kind in enumerate(kinds):
            per_species = occ_info.get(str(kind))
            if not isinstance(per_species, dict):
                continue
            for sym, o in per_species.items():
                if sym == symbols[i]:
                    occ[i] = float(o)
                else:
                    z = _Z.get(sym, 0)
                    if not z:
                        raise StructureError(f"unknown element symbol '{sym}'")
                    extra_pos.append(frac[i])
                    extra_z.append(z)
                    extra_occ.append(float(o))
    if extra_pos:
        frac = np.vstack([frac, extra_pos])
        numbers = np.concatenate([numbers, extra_z])
        occ = np.concatenate([occ, extra_occ])
    _check_occupancy(occ, None)
    n = len(numbers)
    labels = atoms.arrays.get("labels") if hasattr(atoms, "arrays") else None
    if labels is None or len(labels) != n:
        labels = np.array([""] * n)
    cell, frac = _right_handed(cell, frac)
    return Crystal(
        cell=cell,
        frac=frac,
        numbers=numbers,
        occupancy=np.minimum(occ, 1.0),
        labels=np.asarray(labels, dtype=str),
        charges=np.full(n, np.nan),
        name=name,
        source=source,
        meta={"format": fmt, "spacegroup": ""},
    )


def _right_handed(cell: np.ndarray, frac: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Cell and wrapped coordinates with a right-handed cell (det > 0).

    A left-handed cell is turned around by negating all three vectors and all
    coordinates, which leaves every atom where it was.
    """
    if np.linalg.det(cell) < 0:
        cell, frac = -cell, -frac
    return cell, _wrap(frac)


def _check_occupancy(occ: np.ndarray, labels) -> None:
    bad = np.nonzero(~((occ >= MIN_OCCUPANCY) & (occ <= 1.0 + OCC_TOL)))[0]
    if len(bad):
        i = int(bad[0])
        if not occ[i] > 0:
            what = "is not positive"
        elif occ[i] < MIN_OCCUPANCY:
            what = f"is too small to be meant (under {MIN_OCCUPANCY:g})"
        else:
            what = "exceeds 1"
        site = f" of site '{labels[i]}'" if labels is not None and labels[i] else f" of atom {i + 1}"
        raise StructureError(f"occupancy {occ[i]:g}{site} {what}")


def _read_pymatgen_json(path: Path, max_bytes: int) -> list[Crystal]:
    data = _read_bytes(path, max_bytes)
    if not data.strip():
        raise StructureError("empty file")
    text = _decode(data)
    try:
        obj = json.loads(text)
    except ValueError as exc:
        raise StructureError(f"invalid JSON: {_one_line(exc, 120)}") from None
    items = obj if isinstance(obj, list) else [obj]
    if not items:
        raise StructureError("no structure in file")
    from pymatgen.core import Structure

    stem = path.name[: -len(".json.gz")] if path.name.lower().endswith(".gz") else path.stem
    out = []
    for i, item in enumerate(items):
        if not isinstance(item, dict):
            raise StructureError("JSON file does not hold a pymatgen Structure")
        cls = item.get("@class", "")
        if "lattice" not in item or cls in ("Molecule", "IMolecule"):
            if cls in ("Molecule", "IMolecule") or "sites" in item:
                raise StructureError("no periodic cell (a molecule, not a crystal)")
            raise StructureError("JSON file does not hold a pymatgen Structure")
        try:
            s = Structure.from_dict(item)
        except Exception as exc:
            raise StructureError(f"bad pymatgen Structure JSON: {_one_line(exc, 120)}") from None
        if len(items) == 1:
            out.append(_from_pymatgen(s, str(path), stem))
        else:
            out.append(_from_pymatgen(s, f"{path}#{i}", f"{stem}#{i}"))
    return out


def _from_pymatgen(s, source: str, name: str) -> Crystal:
    if not hasattr(s, "lattice"):
        raise StructureError("no periodic cell (a molecule, not a crystal)")
    try:
        cell = np.array(s.lattice.matrix, dtype=np.float64)
        rows = []
        for site in s:
            label = getattr(site, "label", None) or ""
            if not site.is_ordered and label == site.species_string:
                label = ""  # pymatgen's stand-in label such as 'Ga:0.500, Ge:0.500'
            for sp, o in site.species.items():
                z = int(getattr(sp, "Z", 0) or 0)
                if z <= 0:
                    raise StructureError(f"unknown element symbol '{sp}'")
                q = getattr(sp, "oxi_state", None)
                rows.append((site.frac_coords, z, float(o),
                             label, math.nan if q is None else float(q)))
    except StructureError:
        raise
    except Exception as exc:
        raise StructureError(f"not a usable pymatgen Structure: {_one_line(exc, 100)}") from None
    if not rows:
        raise StructureError("no atoms")
    if abs(np.linalg.det(cell)) < 1e-8:
        raise StructureError("no periodic cell (zero cell volume)")
    frac = np.array([r[0] for r in rows], dtype=np.float64)
    occ = np.array([r[2] for r in rows], dtype=np.float64)
    labels = np.array([r[3] for r in rows], dtype=str)
    _check_occupancy(occ, labels)
    if not name:
        name = s.composition.reduced_formula
    cell, frac = _right_handed(cell, frac)
    return Crystal(
        cell=cell,
        frac=frac,
        numbers=np.array([r[1] for r in rows], dtype=np.int64),
        occupancy=np.minimum(occ, 1.0),
        labels=labels,
        charges=np.array([r[4] for r in rows], dtype=np.float64),
        name=name,
        source=source,
        meta={"format": "pymatgen", "spacegroup": ""},
    )
