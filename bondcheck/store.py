"""The results store: a SQLite file that remembers finished work.

Work is keyed by the content hash of an entry and the settings it was checked
with (``Options.key()`` plus the bondcheck version), so a rerun skips what is
done, a renamed or moved file is not checked again, and a scan that was
interrupted (Ctrl-C, kill -9, a power cut) resumes where it stopped: rows are
written in small transactions (four a second) in write-ahead-log mode, and
whatever was not committed is simply checked again.  The primary keys make a
second copy of a row impossible.

Tables
  results(hash, okey, status, timeout, seconds, rows)   rows: zlib-compressed JSON
  entries(entry, okey, hash)                            which entry holds which content
  runs(id, okey, inputs, started, finished, ...)        one line per scan
"""
from __future__ import annotations

import json
import os
import sqlite3
import time
import zlib
from typing import Iterator

SCHEMA = """
CREATE TABLE IF NOT EXISTS results (
    hash TEXT NOT NULL,
    okey TEXT NOT NULL,
    status TEXT NOT NULL,
    timeout REAL,
    seconds REAL NOT NULL,
    rows BLOB NOT NULL,
    PRIMARY KEY (hash, okey)
);
CREATE TABLE IF NOT EXISTS entries (
    entry TEXT NOT NULL,
    okey TEXT NOT NULL,
    hash TEXT NOT NULL,
    PRIMARY KEY (entry, okey)
) WITHOUT ROWID;
CREATE TABLE IF NOT EXISTS runs (
    id INTEGER PRIMARY KEY,
    okey TEXT NOT NULL,
    inputs TEXT NOT NULL,
    started REAL NOT NULL,
    finished REAL,
    entries INTEGER,
    checked INTEGER,
    reused INTEGER,
    wall REAL,
    jobs INTEGER,
    interrupted INTEGER
);
"""

# Keys of a row that belong to its entry rather than to its content.
_ENTRY_KEYS = ("entry", "hash")


class Row(dict):
    """A result row (a plain dict to its users).  ``json`` holds its JSON
    text when a worker has already written it, so the main process need not."""

    __slots__ = ("json",)


def encode(rows: list[dict]) -> bytes:
    """The stored form of an entry's rows (content-only, see :func:`generic`)."""
    return zlib.compress(json.dumps(rows, separators=(",", ":"), allow_nan=False).encode(), 1)


def decode(blob: bytes) -> list[dict]:
    return json.loads(zlib.decompress(blob))


class Store:
    """Finished work, keyed by (content hash, settings key)."""

    def __init__(self, path: str, *, commit_every: float = 0.25):
        self.path = os.fspath(path)
        d = os.path.dirname(os.path.abspath(self.path))
        os.makedirs(d, exist_ok=True)
        self.con = sqlite3.connect(self.path, isolation_level=None, check_same_thread=False)
        self.con.execute("PRAGMA journal_mode=WAL")
        self.con.execute("PRAGMA synchronous=NORMAL")
        self.con.executescript(SCHEMA)
        self.commit_every = commit_every
        self._results: dict[tuple[str, str], tuple] = {}   # written, not yet in the file
        self._entries: dict[tuple[str, str], str] = {}
        self._last_commit = time.monotonic()

    # -- work ---------------------------------------------------------------

    def get(self, digest: str, okey: str) -> tuple[str, float | None, list[dict]] | None:
        """(status, timeout, rows) stored for this content and settings, or None."""
        r = self._results.get((digest, okey))
        if r is None:
            r = self.con.execute(
                "SELECT hash, okey, status, timeout, seconds, rows FROM results WHERE hash=? AND okey=?",
                (digest, okey)).fetchone()
            if r is None:
                return None
        return r[2], r[3], decode(r[5])

    def put(self, digest: str, okey: str, entry: str, status: str, rows: list[dict] | None = None,
            timeout: float | None = None, *, blob: bytes | None = None, seconds: float | None = None) -> None:
        """Remember the rows checked for one entry, in the content-only form
        (see :func:`generic`), given as ``rows`` or already encoded as ``blob``."""
        if blob is None:
            blob = encode(rows or [])
        if seconds is None:
            seconds = float(rows[0].get("entry_seconds") or 0.0) if rows else 0.0
        self._results[(digest, okey)] = (digest, okey, status, timeout, seconds, blob)
        self._entries[(entry, okey)] = digest
        self._tick()

    def link(self, digest: str, okey: str, entry: str) -> None:
        """Record that an entry holds content whose result is already stored."""
        self._entries[(entry, okey)] = digest
        self._tick()

    def _tick(self) -> None:
        if time.monotonic() - self._last_commit >= self.commit_every:
            self.commit()

    def commit(self) -> None:
        """Write what is pending in one transaction."""
        if self._results or self._entries:
            with self.con:
                self.con.execute("BEGIN")
                self.con.executemany("INSERT OR REPLACE INTO results VALUES (?, ?, ?, ?, ?, ?)",
                                     self._results.values())
                self.con.executemany("INSERT OR REPLACE INTO entries VALUES (?, ?, ?)",
                                     [(e, o, h) for (e, o), h in self._entries.items()])
            self._results.clear()
            self._entries.clear()
        self._last_commit = time.monotonic()

    # -- runs ---------------------------------------------------------------

    def start_run(self, okey: str, inputs: list[str], jobs: int) -> int:
        cur = self.con.execute(
            "INSERT INTO runs (okey, inputs, started, jobs, interrupted) VALUES (?, ?, ?, ?, 1)",
            (okey, json.dumps(inputs), time.time(), jobs))
        return int(cur.lastrowid)

    def finish_run(self, run: int, *, entries: int, checked: int, reused: int, wall: float,
                   interrupted: bool) -> None:
        self.commit()
        self.con.execute(
            "UPDATE runs SET finished=?, entries=?, checked=?, reused=?, wall=?, interrupted=? WHERE id=?",
            (time.time(), entries, checked, reused, wall, int(interrupted), run))

    def last_run(self) -> dict | None:
        cur = self.con.execute("SELECT * FROM runs ORDER BY id DESC LIMIT 1")
        r = cur.fetchone()
        if r is None:
            return None
        return dict(zip([d[0] for d in cur.description], r))

    # -- reading back -------------------------------------------------------

    def okeys(self) -> list[str]:
        return [r[0] for r in self.con.execute("SELECT DISTINCT okey FROM entries")]

    def iter_rows(self, okey: str | None = None) -> Iterator[dict]:
        """Every stored row for one settings key (the last run's by default),
        in entry order."""
        self.commit()
        if okey is None:
            run = self.last_run()
            keys = self.okeys()
            okey = run["okey"] if run else (keys[0] if keys else "")
        cur = self.con.execute(
            "SELECT e.entry, e.hash, r.rows FROM entries e JOIN results r "
            "ON r.hash = e.hash AND r.okey = e.okey WHERE e.okey=? ORDER BY e.entry", (okey,))
        for entry, digest, blob in cur:
            yield from specific(decode(blob), entry, digest)

    def close(self) -> None:
        try:
            self.commit()
        finally:
            self.con.close()


def generic(row: dict, entry: str) -> dict:
    """A row without what belongs to its entry: the id and hash are dropped
    and the path keeps only what follows the entry id ('#block')."""
    g = {k: v for k, v in row.items() if k not in _ENTRY_KEYS}
    path = g.get("path") or ""
    g["path"] = path[len(entry):] if path.startswith(entry) else path
    return g


# JSON text of a str, as json.dumps writes it
_json_str = json.encoder.encode_basestring_ascii
_NO_SUFFIX = '{"path":""'


def specific(rows: list[dict], entry: str, digest: str, texts: list[str] | None = None) -> list[Row]:
    """Stored rows made into the rows of one entry: ``entry`` and ``path``
    first, ``hash`` last.  ``texts``: the JSON of each stored row as a worker
    wrote it, ``path`` first, from which the row's own JSON is spliced."""
    out = []
    entry_json = _json_str(entry)
    for i, g in enumerate(rows):
        suffix = g.get("path") or ""
        path = entry + suffix
        r = Row(entry=entry, path=path)
        r.update(g)  # g's keys in g's order after entry and path (path keeps its place:
        r["path"] = path  # g's value, the suffix, replaced by the whole path again)
        r["hash"] = digest
        r.json = None
        if texts is not None:
            text = texts[i]
            if suffix:
                head, path_json = '{"path":' + _json_str(suffix), _json_str(path)
            else:
                head, path_json = _NO_SUFFIX, entry_json
            if text.startswith(head):
                r.json = f'{{"entry":{entry_json},"path":{path_json}{text[len(head):-1]},"hash":"{digest}"}}'
        out.append(r)
    return out
