"""Limits on what one input may cost: bytes read, atoms per cell, archive size.

A CI gate or a database scan sees whatever arrives, so no single input may
exhaust the machine.  Every limit has a documented default (docs/limits.md) and
can be changed, in order of precedence:

* per call:      ``read(path, max_bytes=..., max_atoms=...)``;
* in a block:    ``with limits.applied(max_atoms=500_000): ...`` (the CLI's
  ``--max-atoms`` and ``--max-file-mb`` use this);
* per process:   environment variables ``BONDCHECK_MAX_FILE_MB``,
  ``BONDCHECK_MAX_ATOMS``, ``BONDCHECK_MAX_ARCHIVE_GB`` and
  ``BONDCHECK_MAX_ARCHIVE_ENTRIES`` (inherited by worker processes).

Limits are checked before the expensive work: file sizes before reading, the
atoms of a cell from the asymmetric unit and the symmetry operations before the
expansion, archive members from their declared sizes before decompressing, and
every read stops at the limit however much the data claims or turns out to hold.
"""
from __future__ import annotations

import contextlib
import contextvars
import os
import stat
import zlib
from dataclasses import dataclass, fields, replace

from .record import StructureError

__all__ = ["Limits", "current", "applied", "MAX_FILE_BYTES", "MAX_ATOMS", "MAX_ARCHIVE_BYTES",
           "MAX_ARCHIVE_ENTRIES", "check_size", "check_atoms", "read_capped", "read_file", "gunzip_capped"]

MB = 1024 * 1024
GB = 1024 * MB

# A CIF with its reflections embedded (_shelx_hkl_file) runs to tens of MB;
# coordinates alone, even of a 50,000-atom cell, to a few MB.
MAX_FILE_BYTES = 64 * MB
# Giant intermetallic cells hold a few thousand to about 25,000 atoms (from
# memory: NaCd2 1152, beta-Mg2Al3 1168, the Al-Cu-Ta phase near 23,000);
# the later stages take about a minute per 20,000 atoms.
MAX_ATOMS = 50_000
# Archives are streamed member by member, so these bound time, not memory:
# each member is also held to MAX_FILE_BYTES.
MAX_ARCHIVE_BYTES = 64 * GB
MAX_ARCHIVE_ENTRIES = 2_000_000

_CHUNK = 1 * MB
_FIRST = 64 * 1024


@dataclass(frozen=True, slots=True)
class Limits:
    max_bytes: int = MAX_FILE_BYTES                 # one file, or one archive member, uncompressed
    max_atoms: int = MAX_ATOMS                      # atoms in one unit cell after symmetry expansion
    max_archive_bytes: int = MAX_ARCHIVE_BYTES      # all members of one archive, uncompressed
    max_archive_entries: int = MAX_ARCHIVE_ENTRIES  # members of one archive

    def but(self, **changes) -> "Limits":
        """A copy with the given limits changed (``None`` values are ignored)."""
        changes = {k: v for k, v in changes.items() if v is not None}
        if not changes:
            return self
        for k, v in changes.items():
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not v > 0:
                raise ValueError(f"limit {k} must be a positive number, got {v!r}")
            changes[k] = int(v)
        return replace(self, **changes) if changes else self


_ENV = {
    "max_bytes": ("BONDCHECK_MAX_FILE_MB", MB),
    "max_atoms": ("BONDCHECK_MAX_ATOMS", 1),
    "max_archive_bytes": ("BONDCHECK_MAX_ARCHIVE_GB", GB),
    "max_archive_entries": ("BONDCHECK_MAX_ARCHIVE_ENTRIES", 1),
}
_DEFAULT = Limits()
_override: contextvars.ContextVar[Limits | None] = contextvars.ContextVar("bondcheck_limits", default=None)


def _from_env() -> Limits:
    env = os.environ
    if not any(name in env for name, _ in _ENV.values()):
        return _DEFAULT
    changes = {}
    for field in fields(Limits):
        name, unit = _ENV[field.name]
        raw = env.get(name)
        if raw is None or not raw.strip():
            continue
        try:
            value = float(raw) * unit
        except ValueError:
            raise StructureError(f"environment variable {name}={raw!r} is not a number") from None
        if not value > 0:
            raise StructureError(f"environment variable {name}={raw!r} must be positive")
        changes[field.name] = int(value)
    return _DEFAULT.but(**changes)


def current() -> Limits:
    """The limits in force: those of an enclosing :func:`applied`, else the
    environment's, else the defaults."""
    return _override.get() or _from_env()


@contextlib.contextmanager
def applied(limits: Limits | None = None, **changes):
    """Put limits in force for the calls made inside the ``with`` block.

    ``applied(max_atoms=200_000)`` changes one limit and keeps the others;
    ``None`` values are ignored, so CLI options can be passed straight in.
    """
    new = (limits or current()).but(**changes)
    token = _override.set(new)
    try:
        yield new
    finally:
        _override.reset(token)


# --------------------------------------------------------------------------
# checks
# --------------------------------------------------------------------------

def _size(n: float) -> str:
    if n >= GB:
        return f"{n / GB:.3g} GB"
    if n >= MB:
        return f"{n / MB:.3g} MB"
    if n >= 1024:
        return f"{n / 1024:.3g} kB"
    return f"{int(n)} bytes"


def size_error(size: float, limit: int, what: str = "file", *, at_least: bool = False) -> StructureError:
    more = "more than " if at_least else ""
    return StructureError(f"{what} is {more}{_size(size)}, over the limit of {_size(limit)} "
                          "(raise it with --max-file-mb or max_bytes=)")


def check_size(size: float, limit: int, what: str = "file") -> None:
    if size > limit:
        raise size_error(size, limit, what)


def check_atoms(n: int, limit: int, *, at_least: bool = False) -> None:
    if n > limit:
        more = "at least " if at_least else ""
        raise StructureError(f"the unit cell holds {more}{n:,} atoms, over the limit of {limit:,} "
                             "(raise it with --max-atoms or max_atoms=)")


def read_capped(fh, limit: int, what: str = "file", size: int | None = None) -> bytes:
    """Read a binary stream to its end in chunks, stopping past ``limit`` bytes.

    ``size`` (a regular file's size) sets the first read: one read of exactly
    what is there, rather than a megabyte buffer allocated for a small file.
    """
    parts, total = [], 0
    first = min(size + 1, limit + 1) if size is not None else min(_FIRST, limit + 1)
    chunk = fh.read(first)
    if len(chunk) < first:  # the whole stream at once: the usual case
        return chunk
    parts.append(chunk)
    total = len(chunk)
    if total > limit:
        raise size_error(total, limit, what, at_least=True)
    while True:
        chunk = fh.read(min(_CHUNK, limit + 1 - total))
        if not chunk:
            break
        parts.append(chunk)
        total += len(chunk)
        if total > limit:
            raise size_error(total, limit, what, at_least=True)
    return b"".join(parts)


# os.open flags for reading a file's bytes as they are (binary mode where the
# platform has a text mode, as open(path, "rb"))
O_READ = os.O_RDONLY | getattr(os, "O_BINARY", 0)


class FdReads:
    """An open file descriptor read as a buffered binary file reads it, for
    :func:`read_capped` (os.read costs less than a Python file object):
    ``read(n)`` returns n bytes unless the file ends first (one os.read may
    return fewer, from a pipe say)."""

    __slots__ = ("fd",)

    def __init__(self, fd: int):
        self.fd = fd

    def read(self, n: int) -> bytes:
        data = os.read(self.fd, n)
        if 0 < len(data) < n:
            parts = [data]
            got = len(data)
            while got < n:
                more = os.read(self.fd, n - got)
                if not more:
                    break
                parts.append(more)
                got += len(more)
            data = b"".join(parts)
        return data


def read_file(path, limit: int, what: str = "file") -> bytes:
    """A file's bytes, through its bare descriptor (os.open and os.read, see
    :class:`FdReads`): a regular file over ``limit`` bytes turned away by its
    size before reading, and no file read past ``limit`` (StructureError),
    should it grow meanwhile or have no size (a pipe).  A regular file takes
    one read of the size it has and one more that finds its end.  OSError as
    os.open and os.read raise it."""
    fd = os.open(path, O_READ)
    try:
        size = None
        st = os.fstat(fd)
        if stat.S_ISREG(st.st_mode):
            size = st.st_size
            check_size(size, limit, what)
        return read_capped(FdReads(fd), limit, what, size=size)
    finally:
        os.close(fd)


def gunzip_capped(data: bytes, limit: int, what: str = "file") -> bytes:
    """Decompress gzip data (several members allowed), stopping past ``limit`` bytes.

    A gzip bomb costs at most ``limit`` bytes of memory and the time to
    inflate them.  Raises StructureError for corrupt data.
    """
    out, total = [], 0
    rest = data
    try:
        while rest:
            d = zlib.decompressobj(wbits=31)  # gzip header and trailer
            buf = rest
            while buf:
                piece = d.decompress(buf, limit + 1 - total)
                out.append(piece)
                total += len(piece)
                if total > limit:
                    raise size_error(total, limit, f"{what} (uncompressed)", at_least=True)
                buf = d.unconsumed_tail
                if d.eof:
                    break
            if not d.eof:
                raise StructureError("corrupt gzip file: compressed data end early")
            rest = d.unused_data.lstrip(b"\0")  # members may be padded with zeros
    except zlib.error as exc:
        raise StructureError(f"corrupt gzip file: {exc}") from None
    return b"".join(out)
