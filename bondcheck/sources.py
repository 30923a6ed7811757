"""Enumerate the entries of a collection for a scan, one at a time.

An *entry* is one thing the reader can turn into crystals: a structure file,
a structure file inside a zip or tar archive (read in place, never unpacked to
disk), or a row of an ase database.  Each has a stable id:

    data/run3/sample.cif              a file
    batch.zip::run3/sample.cif        a member of an archive
    candidates.db::id=17              a row of an ase database

Inputs are expanded lazily, so a collection of millions of files never sits in
memory as a list: directories are walked one directory at a time (each sorted),
archives are streamed member by member and databases are read in pages.

An entry whose bytes cannot be had (a missing path, a corrupt archive member,
a file that is not an ase database) comes out with ``error`` set, so that it is
accounted for in the scan like any other.
"""
from __future__ import annotations

import glob
import hashlib
import os
import re
import stat
import sys
from typing import Iterable, Iterator

from .limits import current, gunzip_capped, read_capped, read_file, size_error
from .record import StructureError

__all__ = ["Entry", "iter_entries", "count_entries", "load_crystals", "read_list"]

ARCHIVE_SUFFIXES = (".zip", ".tar", ".tar.gz", ".tgz", ".tar.bz2", ".tbz2", ".tar.xz", ".txz")
DB_SUFFIXES = (".db",)
_GLOB_CHARS = re.compile(r"[*?\[]")
_CIF_SUFFIXES = (".cif", ".mcif")
_OTHER_TEXT = (".json", ".vasp", ".poscar", ".xyz", ".extxyz")
_CIF_START = re.compile(rb"\A(?:\s*#[^\n]*\n)*\s*data_", re.IGNORECASE)
_DB_PAGE = 500


class Entry:
    """One unit of scan work. Plain data, cheap to pickle to a worker."""

    __slots__ = ("id", "name", "data", "path", "atoms", "error", "digest", "seq", "sent", "batched")

    def __init__(self, id: str, name: str, *, data: bytes | None = None, path: str | None = None,
                 atoms=None, error: str | None = None):
        self.id = id
        self.name = name          # base name, used to tell the format (sample.cif, POSCAR, ...)
        self.data = data          # raw bytes as stored (still gzip-compressed for *.gz)
        self.path = path          # the file on disk, for plain files
        self.atoms = atoms        # an ase Atoms, for database rows
        self.error = error        # why the entry could not be opened
        self.digest = ""          # content hash, set by :meth:`content_hash`
        self.seq = 0              # position in the scan, set by the scanner
        self.sent = 0.0           # when it was handed to a worker
        self.batched = False      # handed over with others, checked together

    def __getstate__(self):
        return (self.id, self.name, self.data, self.path, self.atoms, self.error, self.digest, self.seq)

    def __setstate__(self, state):
        (self.id, self.name, self.data, self.path, self.atoms, self.error, self.digest, self.seq) = state
        self.sent = 0.0
        self.batched = False

    def __repr__(self) -> str:
        return f"Entry({self.id!r})"

    def content_hash(self) -> str:
        """BLAKE2b-128 of the entry's base name and content (hex).

        The base name is part of the key because it decides how the bytes are
        read (a POSCAR and a CIF can hold the same text) and names the
        structure for formats without block names."""
        if not self.digest:
            h = hashlib.blake2b(digest_size=16)
            h.update(self.name.encode("utf-8", "surrogateescape"))
            h.update(b"\0")
            if self.data is not None:
                h.update(self.data)
            elif self.atoms is not None:
                a = self.atoms
                for arr in (a.numbers, a.positions, a.cell.array, a.pbc):
                    h.update(arr.tobytes())
                occ = a.info.get("occupancy") if hasattr(a, "info") else None
                if occ:
                    h.update(repr(sorted(occ.items())).encode())
            self.digest = h.hexdigest()
        return self.digest


# --------------------------------------------------------------------------
# enumeration
# --------------------------------------------------------------------------


def _is_structure_name(name: str) -> bool:
    from .read import _is_structure_name as known

    return known(name)


def _is_archive(name: str) -> bool:
    return name.lower().endswith(ARCHIVE_SUFFIXES)


def _is_db(name: str) -> bool:
    return name.lower().endswith(DB_SUFFIXES)


def _wanted(name: str) -> bool:
    return not name.startswith(".") and (_is_structure_name(name) or _is_archive(name) or _is_db(name))


def read_list(path: str) -> Iterator[str]:
    """The inputs named in a list file, one a line ('-' reads standard input).
    Blank lines and lines starting with '#' are skipped."""
    fh = sys.stdin if path == "-" else open(path, encoding="utf-8")
    try:
        for line in fh:
            line = line.strip()
            if line and not line.startswith("#"):
                yield line
    finally:
        if fh is not sys.stdin:
            fh.close()


def iter_entries(inputs: Iterable[str], *, load: bool = True) -> Iterator[Entry]:
    """Yield the entries of the given inputs: files, directories (recursive),
    glob patterns, zip and tar archives and ase databases, in a stable order.

    With ``load=False`` only ids and names are produced (no bytes are read),
    which is what counting needs."""
    for arg in inputs:
        arg = os.fspath(arg)
        try:
            is_dir = stat.S_ISDIR(os.stat(arg).st_mode)
        except OSError:
            is_dir = None  # does not exist (or cannot be looked at)
        if is_dir:
            yield from _walk(arg, load)
        elif is_dir is not None:
            yield from _one_path(arg, load)
        elif _GLOB_CHARS.search(arg):
            matches = sorted(glob.glob(arg, recursive=True))
            if not matches:
                yield Entry(arg, os.path.basename(arg), error="no files match this pattern")
            for m in matches:
                if os.path.isdir(m):
                    yield from _walk(m, load)
                elif _wanted(os.path.basename(m)):
                    yield from _one_path(m, load)
        else:
            yield Entry(arg, os.path.basename(arg), error="no such file or directory")


def count_entries(inputs: Iterable[str]) -> int:
    """How many entries :func:`iter_entries` will yield (reads no structure)."""
    n = 0
    for _ in iter_entries(inputs, load=False):
        n += 1
    return n


def _walk(root: str, load: bool, seen: set | None = None) -> Iterator[Entry]:
    """Files under root, depth first, each directory sorted by name; hidden
    files and directories are skipped.  A directory reached a second time
    through a link (a link back up the tree would loop) is not walked again."""
    seen = set() if seen is None else seen
    try:
        st = os.stat(root)
        if (st.st_dev, st.st_ino) in seen:
            return
        seen.add((st.st_dev, st.st_ino))
        with os.scandir(root) as it:
            items = sorted((e.name, e.is_dir()) for e in it if not e.name.startswith("."))
    except OSError as exc:
        yield Entry(root, os.path.basename(root), error=f"cannot list directory: {exc.strerror or exc}")
        return
    for name, is_dir in items:
        path = os.path.join(root, name)
        if is_dir:
            yield from _walk(path, load, seen)
        elif _wanted(name):
            yield from _one_path(path, load)


def _one_path(path: str, load: bool) -> Iterator[Entry]:
    name = os.path.basename(path)
    if _is_archive(name):
        yield from _archive(path, load)
    elif _is_db(name):
        yield from _database(path, load)
    elif not load:
        yield Entry(path, name, path=path)
    else:
        try:
            data = read_file(path, current().max_bytes)
        except OSError as exc:
            yield Entry(path, name, path=path, error=f"cannot read file: {exc.strerror or exc}")
            return
        except StructureError as exc:
            yield Entry(path, name, path=path, error=str(exc))
            return
        yield Entry(path, name, data=data, path=path)


def _member_entry(archive: str, member: str, data: bytes | None) -> Entry:
    return Entry(f"{archive}::{member}", member.rsplit("/", 1)[-1], data=data)


_DRIVE = re.compile(r"^[A-Za-z]:")


def _member_wanted(member: str) -> tuple[bool, str | None]:
    """(take it, error) for an archive member name.

    Names that would lead out of the archive's folder if it were unpacked
    (absolute, with a drive letter, or with '..' parts) are reported, never
    read: nothing is written to disk in any case, but such an archive is
    broken or hostile and its owner should know."""
    parts = member.replace("\\", "/").split("/")
    base = parts[-1]
    if member.startswith(("/", "\\")) or _DRIVE.match(member) or ".." in parts:
        if _is_structure_name(base) or _is_archive(base) or _is_db(base):
            return True, "unsafe member name (absolute or with '..', leads outside the archive): not read"
        return False, None
    if any(p.startswith(".") or p == "__MACOSX" for p in parts if p):
        return False, None
    if _is_archive(base) or _is_db(base):
        return True, "an archive or database inside an archive is not read: unpack it first"
    return _is_structure_name(base), None


_LINK_ERROR = "a link inside an archive is not followed: store the file itself"


def _over(what: str, path: str, limit_name: str, message: str) -> Entry:
    return Entry(f"{path}::", os.path.basename(path), error=f"{what} {message} (raise it with {limit_name})")


def _zip_entry_count(path: str) -> int | None:
    """Members of a zip archive as its end record says, read before the central
    directory is (which costs memory for each member); None if unknown."""
    import zipfile

    try:
        with open(path, "rb") as fh:
            end = zipfile._EndRecData(fh)  # the standard library's own reader of the end record
    except (AttributeError, OSError, ValueError):
        return None
    return int(end[4]) if end else None  # _ECD_ENTRIES_TOTAL


def _archive(path: str, load: bool) -> Iterator[Entry]:
    if path.lower().endswith(".zip"):
        yield from _zip(path, load)
    else:
        yield from _tar(path, load)


def _zip(path: str, load: bool) -> Iterator[Entry]:
    import zipfile

    lim = current()
    n = _zip_entry_count(path)
    if n is not None and n > lim.max_archive_entries:
        yield _over("zip archive", path, "BONDCHECK_MAX_ARCHIVE_ENTRIES",
                    f"holds {n:,} members, over the limit of {lim.max_archive_entries:,}: not read")
        return
    try:
        zf = zipfile.ZipFile(path)
    except (OSError, zipfile.BadZipFile) as exc:
        yield Entry(path, os.path.basename(path), error=f"cannot open zip archive: {exc}")
        return
    total = 0
    with zf:
        infos = zf.infolist()
        if len(infos) > lim.max_archive_entries:
            yield _over("zip archive", path, "BONDCHECK_MAX_ARCHIVE_ENTRIES",
                        f"holds {len(infos):,} members, over the limit of {lim.max_archive_entries:,}: not read")
            return
        for info in infos:
            if info.is_dir():
                continue
            take, err = _member_wanted(info.filename)
            if not take:
                continue
            if not err and (info.external_attr >> 16) & 0o170000 == 0o120000:
                err = _LINK_ERROR
            if not err and info.file_size > lim.max_bytes:
                err = str(size_error(info.file_size, lim.max_bytes, "archive member"))
            if err or not load:
                e = _member_entry(path, info.filename, None)
                e.error = err
                yield e
                continue
            if total + info.file_size > lim.max_archive_bytes:
                yield _over("zip archive", path, "BONDCHECK_MAX_ARCHIVE_GB",
                            f"expands past the limit of {lim.max_archive_bytes / 2**30:g} GB: "
                            "the members from here on are not read")
                return
            try:
                with zf.open(info) as fh:
                    data = read_capped(fh, lim.max_bytes, "archive member")
            except StructureError as exc:  # it holds more than it declared
                e = _member_entry(path, info.filename, None)
                e.error = str(exc)
                yield e
                continue
            except Exception as exc:  # CRC errors, unsupported compression, truncation
                e = _member_entry(path, info.filename, None)
                e.error = f"cannot read archive member: {exc}"
                yield e
                continue
            total += len(data)
            yield _member_entry(path, info.filename, data)


def _tar(path: str, load: bool) -> Iterator[Entry]:
    import tarfile

    try:
        tf = tarfile.open(path, mode="r|*")  # a stream: members in order, no seeking
    except (OSError, tarfile.TarError) as exc:
        yield Entry(path, os.path.basename(path), error=f"cannot open tar archive: {exc}")
        return
    lim = current()
    count = total = 0
    with tf:
        try:
            for m in tf:
                tf.members = []  # a TarFile keeps every member it has read: memory would grow with the archive
                count += 1
                total += max(0, m.size)  # a stream inflates what it skips, too
                if count > lim.max_archive_entries:
                    yield _over("tar archive", path, "BONDCHECK_MAX_ARCHIVE_ENTRIES",
                                f"holds more than {lim.max_archive_entries:,} members: the rest are not read")
                    return
                if total > lim.max_archive_bytes:
                    yield _over("tar archive", path, "BONDCHECK_MAX_ARCHIVE_GB",
                                f"expands past the limit of {lim.max_archive_bytes / 2**30:g} GB: "
                                "the members from here on are not read")
                    return
                link = m.issym() or m.islnk()
                if not (m.isfile() or link):
                    continue
                take, err = _member_wanted(m.name)
                if not take:
                    continue
                if not err and link:
                    err = _LINK_ERROR
                if not err and m.size > lim.max_bytes:
                    err = str(size_error(m.size, lim.max_bytes, "archive member"))
                if err or not load:
                    e = _member_entry(path, m.name, None)
                    e.error = err
                    yield e
                    continue
                fh = tf.extractfile(m)
                yield _member_entry(path, m.name, read_capped(fh, lim.max_bytes, "archive member") if fh else b"")
        except (OSError, EOFError, tarfile.TarError) as exc:
            yield Entry(f"{path}::", os.path.basename(path),
                        error=f"tar archive is corrupt or truncated after the entries above: {exc}")


def _database(path: str, load: bool) -> Iterator[Entry]:
    import sqlite3

    name = os.path.basename(path)
    try:
        con = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
        try:
            ok = con.execute("SELECT name FROM sqlite_master WHERE type='table' AND name='systems'").fetchone()
            if ok and not load:
                ids = [r[0] for r in con.execute("SELECT id FROM systems ORDER BY id")]
        finally:
            con.close()
    except sqlite3.Error as exc:
        yield Entry(path, name, error=f"not an ase database (SQLite): {exc}")
        return
    if not ok:
        yield Entry(path, name, error="not an ase database: no 'systems' table")
        return
    if not load:
        for i in ids:
            yield Entry(f"{path}::id={i}", name)
        return
    import ase.db

    db = ase.db.connect(path, type="db")
    last = 0
    while True:
        page = list(db.select(f"id>{last}", sort="id", limit=_DB_PAGE))
        if not page:
            break
        for row in page:
            last = row.id
            eid = f"{path}::id={row.id}"
            try:
                atoms = row.toatoms()
                atoms.calc = None
            except Exception as exc:
                yield Entry(eid, name, error=f"cannot read database row: {exc}")
                continue
            label = row.get("name") or row.formula
            yield Entry(eid, f"{label}", atoms=atoms)


# --------------------------------------------------------------------------
# entry -> crystals (runs in the workers)
# --------------------------------------------------------------------------


def load_crystals(entry: Entry) -> list:
    """Read an entry into crystal records with ``source`` set to the entry id
    (``id#block`` when it holds several).  Raises StructureError."""
    from .read import read, read_cif_bytes

    if entry.error:
        raise StructureError(entry.error)
    if entry.atoms is not None:
        crystals = read(entry.atoms)
        for c in crystals:
            c.source, c.name = entry.id, entry.name
        return crystals
    data, name = entry.data, entry.name
    if data is None:
        if entry.path is None:
            raise StructureError("nothing to read")
        return read(entry.path)
    lname = name.lower()
    if lname.endswith(".gz") and lname[:-3].endswith(_CIF_SUFFIXES):
        data = gunzip_capped(data, current().max_bytes)
        lname = lname[:-3]
    if lname.endswith(_CIF_SUFFIXES) or (
        not lname.endswith(_OTHER_TEXT) and not name.startswith(("POSCAR", "CONTCAR"))
        and _CIF_START.match(data[:65536].lstrip(b"\xef\xbb\xbf"))
    ):
        return read_cif_bytes(data, entry.id)
    if entry.path is not None:
        return read(entry.path)
    return _read_via_file(entry, data)


def _read_via_file(entry: Entry, data: bytes) -> list:
    """Readers other than CIF take a path: write the bytes to a private
    temporary file under the entry's own base name and read that."""
    import tempfile

    from .read import read

    # only the base name, and never one that leads out of the folder
    base = entry.name.replace("\\", "/").rsplit("/", 1)[-1].lstrip(".") or "entry"
    with tempfile.TemporaryDirectory(prefix="bondcheck-") as tmp:
        p = os.path.join(tmp, base)
        with open(p, "wb") as fh:
            fh.write(data)
        crystals = read(p)
    for c in crystals:
        if c.source.startswith(p):
            c.source = entry.id + c.source[len(p):]
        else:
            c.source = entry.id
    return crystals
