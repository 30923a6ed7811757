"""Scan whole collections: in parallel, resumable, with progress.

The work for a chunk of entries is :func:`check_entries`: read them
(:func:`bondcheck.sources.load_crystals`) and run
:func:`bondcheck.api.check_crystals` on the crystals they hold (:func:`check_entry`
for one entry).  Everything else here moves entries to that function and rows
back:

* the main process enumerates the inputs lazily, reads each entry's bytes and
  hashes them; work already in the results store (same content, same
  settings) is not done again;
* worker processes (or threads of a Dask cluster) check the entries; at most a
  few chunks per worker are in flight, so memory stays flat however long the
  scan;
* a worker still busy with one entry after ``timeout`` seconds is killed and
  replaced; the entry gets a row with status ``timeout`` (a chunk that
  overruns is checked again entry by entry, to find the one at fault);
* rows are written to the store as they arrive and streamed to the output
  files; a :class:`Tally` keeps what the closing summary needs.

    >>> from bondcheck.scan import scan
    >>> tally = scan(["collection/"], out=["results.parquet"], jobs=2)
    >>> print(render_summary(tally))
"""
from __future__ import annotations

import hashlib
import heapq
import json
import os
import select
import sys
import time
import zlib
from collections import Counter, deque
from typing import Callable, Iterable, Iterator

from .sources import Entry, iter_entries, load_crystals
from .store import Store, specific

__all__ = ["scan", "Scanner", "Tally", "check_entry", "check_entries", "settings_key", "open_writer",
           "read_rows", "summarize", "render_summary", "EXIT_OK", "EXIT_FLAGGED", "EXIT_USAGE"]

EXIT_OK, EXIT_FLAGGED, EXIT_USAGE, EXIT_INTERRUPTED = 0, 1, 2, 130
DEFAULT_STORE = "bondcheck-store.sqlite"
DEFAULT_CHUNK = 32

# Findings that point at a wrong structure rather than unusual chemistry:
# they head the list of entries worth a look whenever they are present.
PRIORITY_SLUGS = {"possibly-misassigned-element": 100.0, "missing-hydrogen": 95.0, "possibly-missing-atoms": 90.0}
SEVERITY_SCORE = {"error": 50.0, "warning": 10.0}
FAILED_SCORE = 30.0      # an entry that could not be checked (status error or timeout)
MISMATCH_BONUS = 5.0


def _take_chunk(take: Callable[[], "Entry | None"], size: int) -> list:
    """Up to `size` entries from `take` (which returns None when there are no
    more), each stamped with the time it is sent."""
    chunk = []
    while len(chunk) < size:
        e = take()
        if e is None:
            break
        chunk.append(e)
    now = time.monotonic()
    for e in chunk:
        e.sent = now
    return chunk


def settings_key(options) -> str:
    """What the store keys work by besides content: the check settings and
    the bondcheck version (a new version may judge differently)."""
    from . import __version__

    return f"{options.key()};bondcheck={__version__}"


def default_jobs() -> int:
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # not on Linux
        return max(1, os.cpu_count() or 1)


# --------------------------------------------------------------------------
# the work for one entry (runs in a worker)
# --------------------------------------------------------------------------


def _row(path: str, status: str, error: str | None, name: str = "") -> dict:
    from .api import Result

    return Result(path=path, status=status, error=error, name=name).to_dict()


def check_entry(entry: Entry, options) -> tuple[str, list[dict]]:
    """Check one entry: (status, rows).  Rows are ``Result.to_dict()`` in the
    store's content-only form (``path`` is what follows the entry id: '' or
    '#block') plus ``entry_seconds``.  Never raises for bad input."""
    return check_entries([entry], options)[0]


def check_entries(entries: list[Entry], options) -> list[tuple[str, list[dict]]]:
    """`check_entry` for each entry: all are read first, then their
    structures are checked together, stage by stage (`check_crystals`).
    ``entry_seconds`` is the entry's reading time plus its structures' own
    stage times."""
    from .api import check_crystals
    from .record import StructureError

    loaded = []
    for entry in entries:
        t0 = time.perf_counter()
        rows: list[dict] = []
        crystals: list = []
        try:
            crystals = load_crystals(entry)
        except StructureError as exc:
            rows.append(_row("", "error", str(exc)))
        except MemoryError:
            rows.append(_row("", "error", "out of memory while reading"))
        except Exception as exc:  # a reader bug must not stop the scan
            rows.append(_row("", "error", f"unexpected {type(exc).__name__} while reading: {exc}"))
        else:
            if not crystals:
                rows.append(_row("", "error", "no structure in this entry"))
        loaded.append((time.perf_counter() - t0, crystals, rows))
    results = iter(check_crystals([c for _, cs, _ in loaded for c in cs], options))
    out = []
    for entry, (seconds, crystals, rows) in zip(entries, loaded):
        n = len(entry.id)
        for _ in crystals:
            r = next(results)
            seconds += r.seconds
            d = r.to_dict()  # the fields in order: 'path' first, as _answers needs
            p = d.get("path") or ""
            d["path"] = p[n:] if p.startswith(entry.id) else ""
            rows.append(d)
        dt = round(seconds, 5)
        for d in rows:
            d["entry_seconds"] = dt
        out.append(("error" if any(d["status"] != "ok" for d in rows) else "ok", rows))
    return out


# What the main process needs of a row to keep the tally, when no output
# needs the whole row (see Scanner(full_rows=...)).
BRIEF_KEYS = ("status", "error", "name", "formula", "verdict", "causes", "residual", "entry_seconds", "path")


def _brief(d: dict) -> dict:
    b = {k: d.get(k) for k in BRIEF_KEYS}
    b["findings"] = [{"slug": f.get("slug"), "severity": f.get("severity"), "message": f.get("message")}
                     for f in d.get("findings") or []]
    return b


# JSON text of a row, compact, as json.dumps(row, separators=(",", ":"),
# allow_nan=False) writes it.  Rows are trees (built afresh by check_entries,
# or decoded from the store's JSON: no object inside itself), so the encoder
# need not watch for circular references: 31 instead of 36 us for a row of 3 kB.
_row_text = json.JSONEncoder(separators=(",", ":"), allow_nan=False, check_circular=False).encode


def _answers(entries: list[Entry], job: tuple) -> list[tuple]:
    """What a worker sends back for each entry: (seq, status, rows, blob,
    texts).  The store's blob and the JSON text of each row are made here, in
    parallel, rather than in the main process; ``rows`` are whole only when
    the main process needs them, the blob only when there is a store
    (job = (options, full_rows, limits, to_store))."""
    from .limits import applied

    options, full, limits, to_store = job
    with applied(limits):
        checked = check_entries(entries, options)
    out = []
    for e, (status, rows) in zip(entries, checked):
        # one encoding per row serves the store and the JSON Lines output
        # (each row begins with its path, a str: check_entries sees to it)
        texts = [_row_text(d) for d in rows]
        blob = zlib.compress(("[" + ",".join(texts) + "]").encode(), 1) if to_store else None
        out.append((e.seq, status, rows if full else [_brief(d) for d in rows], blob, texts))
    return out


def _check_chunk(entries: list[Entry], job: tuple) -> list[tuple]:
    """A chunk of entries, as a Dask task."""
    return _answers(entries, job)


def _timeout_rows(timeout: float, elapsed: float) -> list[dict]:
    d = _row("", "timeout", f"still running after {timeout:g} s (--timeout): stopped")
    d["entry_seconds"] = round(elapsed, 5)
    return [d]


def _failed_rows(message: str) -> list[dict]:
    d = _row("", "error", message)
    d["entry_seconds"] = 0.0
    return [d]


# --------------------------------------------------------------------------
# executors: where check_entries runs
# --------------------------------------------------------------------------

# (entry, status, rows, blob or None, row texts or None)
Completion = tuple
# Status of an entry whose worker died under it (or whose cluster task
# failed): its row says 'error', but it is not stored, so that a rerun tries
# it again rather than remember what may have been a passing accident.
CRASH = "crash"


class _Inline:
    """In the calling process, one entry at a time (no timeout, no isolation
    from crashes): for debugging and for measuring scan overhead."""

    def __init__(self, job: tuple):
        self.job = job
        self.queue: deque[Entry] = deque()
        self.nworkers = 1

    @property
    def busy(self) -> bool:
        return bool(self.queue)

    def fill(self, take: Callable[[], Entry | None]) -> None:
        if not self.queue:
            e = take()
            if e is not None:
                self.queue.append(e)

    def poll(self, wait: float) -> list[Completion]:
        e = self.queue.popleft()
        return [(e, *_answers([e], self.job)[0][1:])]

    def close(self) -> None:
        self.queue.clear()

    abort = close


def _worker_main(tasks, conn, job: tuple, main_pid: int) -> None:
    """Loop of a worker process: chunks of entries in, one message per chunk
    out (the list of its entries' answers, in order: a batch is checked as a
    whole, so nothing is finished earlier that a per-entry message could
    save; a chunk of one is the single-entry case)."""
    import queue
    import signal

    signal.signal(signal.SIGINT, signal.SIG_IGN)  # Ctrl-C is the main process's business
    ppid = os.getppid()
    while True:
        try:
            chunk = tasks.get(timeout=1.0)
        except queue.Empty:
            if os.getppid() != ppid or not _alive(main_pid):
                return  # the scan is gone (killed): do not linger
            continue
        except (EOFError, OSError):
            return
        if chunk is None:
            return
        msg = _answers(chunk, job)
        try:
            conn.send(msg)
        except (BrokenPipeError, OSError):
            return


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


class _Worker:
    __slots__ = ("proc", "tasks", "conn", "out", "last", "done", "ready")

    def __init__(self, proc, tasks, conn):
        self.proc, self.tasks, self.conn = proc, tasks, conn
        self.ready = select.poll()   # is there more to read on conn? (cheaper than conn.poll())
        self.ready.register(conn.fileno(), select.POLLIN)
        self.out: deque[Entry] = deque()   # sent, not yet answered, in order
        self.last = time.monotonic()       # last answer (or start)
        self.done = 0


# Entries a worker process checks before it is replaced by a fresh one: what
# a long-lived process accumulates (allocator fragmentation; with a vesin
# other than 0.6, searched through its Python wrapper, the ctypes array types
# that wrapper makes for every new number of pairs, about 4 kB each and never
# freed) stays bounded however long the scan.
RENEW_AFTER = 20000


class _Processes:
    """A pool of worker processes, each fed its own queue of chunks, so that
    the main process always knows which entry a worker is busy with and can
    kill exactly that worker when the entry overruns its time."""

    def __init__(self, job: tuple, jobs: int, timeout: float | None, chunk: int):
        import multiprocessing as mp

        self.job, self.timeout, self.chunk = job, timeout, max(1, chunk)
        self.limit = 2 * self.chunk
        # what the workers need loaded: spglib only for a scan that searches
        # symmetry (bondcheck._warm then warms its path as well)
        preload = ["bondcheck.scan", "spglib", "bondcheck._warm"] if job[0].symmetry else \
            ["bondcheck.scan", "bondcheck._warm"]
        main_file = getattr(sys.modules.get("__main__"), "__file__", None)
        if main_file and not os.path.exists(main_file):
            # a program read from standard input cannot be imported again in a
            # fresh interpreter: fork this (warmed) process instead
            import importlib

            for name in preload[1:]:
                try:
                    importlib.import_module(name)
                except ImportError:  # as the server would: a worker imports it when it needs it
                    pass
            self.ctx = mp.get_context("fork")
        else:
            self.ctx = mp.get_context("forkserver")
            self.ctx.set_forkserver_preload(preload)
        self.retry: deque[Entry] = deque()
        self.deaths = 0
        self.nworkers = jobs
        self._poller = select.poll()
        self._fds: dict[int, _Worker] = {}
        self.workers = [self._spawn() for _ in range(jobs)]

    def _spawn(self) -> _Worker:
        tasks = self.ctx.Queue()
        mine, theirs = self.ctx.Pipe(duplex=True)
        proc = self.ctx.Process(target=_worker_main, args=(tasks, theirs, self.job, os.getpid()),
                                name="bondcheck-worker", daemon=True)
        proc.start()
        theirs.close()
        w = _Worker(proc, tasks, mine)
        for fd in (mine.fileno(), proc.sentinel):
            self._poller.register(fd, select.POLLIN | select.POLLERR | select.POLLHUP)
            self._fds[fd] = w
        return w

    @property
    def busy(self) -> bool:
        return bool(self.retry) or any(w.out for w in self.workers)

    def fill(self, take: Callable[[], Entry | None]) -> None:
        for w in sorted(self.workers, key=lambda w: len(w.out)):
            if w.done >= RENEW_AFTER:
                if w.out:
                    continue  # gets no more work; renewed once it has answered
                w = self._renew(w)
            while len(w.out) + self.chunk <= self.limit:
                if self.retry:  # given back after a batch failed: one at a time
                    chunk = _take_chunk(self.retry.popleft, 1)
                else:
                    chunk = _take_chunk(take, self.chunk)
                if not chunk:
                    return
                for e in chunk:
                    e.batched = len(chunk) > 1
                if not w.out:
                    w.last = chunk[0].sent
                w.out.extend(chunk)
                w.tasks.put(chunk)
                if len(chunk) < self.chunk and not self.retry:
                    return

    def poll(self, wait: float) -> list[Completion]:
        done: list[Completion] = []
        if self.timeout is not None:
            now = time.monotonic()
            for w in self.workers:
                if w.out:
                    left = max(w.last, w.out[0].sent) + self.timeout - now
                    wait = min(wait, max(left, 0.0))
        try:
            ready = self._poller.poll(max(0, int(wait * 1000)))
        except InterruptedError:
            ready = []
        dead = []
        for fd, _ in ready:
            w = self._fds.get(fd)
            if w is None or w in dead:
                continue
            if not self._drain(w, done) or fd == w.proc.sentinel:
                dead.append(w)
        for w in dead:
            self._replace(w, done, "died")
        if self.timeout is not None:
            now = time.monotonic()
            for w in list(self.workers):
                if w.out and now - max(w.last, w.out[0].sent) > self.timeout:
                    if not self._drain(w, done):
                        self._replace(w, done, "died")
                    elif w.out and now - max(w.last, w.out[0].sent) > self.timeout:
                        self._replace(w, done, "timeout")
        return done

    def _drain(self, w: _Worker, done: list[Completion]) -> bool:
        """Take every answer waiting on a worker's pipe; False if the pipe broke."""
        try:
            while w.ready.poll(0):
                answers = w.conn.recv()  # one chunk's answers
                for seq, *answer in answers:
                    e = w.out.popleft()
                    if e.seq != seq:  # cannot happen: a worker answers in order
                        raise RuntimeError(f"worker answered entry {seq}, expected {e.seq}")
                    done.append((e, *answer))
                w.last = time.monotonic()
                w.done += len(answers)
                self.deaths = 0
        except (EOFError, OSError):
            return False
        return True

    def _replace(self, w: _Worker, done: list[Completion], why: str) -> None:
        now = time.monotonic()
        code = self._stop(w, kill=why == "timeout")
        if w.out and w.out[0].batched:
            # The worker was on a batch: which entry is to blame is unknown,
            # so every entry it held is checked again, one at a time.
            self.retry.extendleft(reversed(w.out))
            w.out.clear()
            if why != "timeout" and not w.done:
                self.deaths += 1
        elif w.out:
            head = w.out.popleft()
            if why == "timeout":
                done.append((head, "timeout", _timeout_rows(self.timeout, now - max(w.last, head.sent)), None, None))
            else:
                if not w.done:
                    self.deaths += 1
                done.append((head, CRASH, _failed_rows(
                    f"the worker process stopped while checking this entry (exit code {code})"), None, None))
            self.retry.extendleft(reversed(w.out))
            w.out.clear()
        elif why != "timeout" and not w.done:
            self.deaths += 1
        if self.deaths > 3 * len(self.workers) + 10:
            raise RuntimeError("worker processes keep stopping without finishing any entry; "
                               "run with --executor inline to see the error")
        self._respawn(w)

    def _renew(self, w: _Worker) -> _Worker:
        """Replace an idle worker that has done its share with a fresh one."""
        try:
            w.tasks.put(None)
        except (OSError, ValueError):
            pass
        self._stop(w)
        return self._respawn(w)

    def _stop(self, w: _Worker, kill: bool = False) -> int | None:
        """End a worker (at once with kill, else within 5 s of its last
        task) and let go of its pipes; returns its exit code."""
        if kill:
            w.proc.kill()
        w.proc.join(5)
        if w.proc.is_alive():
            w.proc.kill()
            w.proc.join()
        self._discard(w)
        return w.proc.exitcode

    def _respawn(self, w: _Worker) -> _Worker:
        """A fresh worker in w's place."""
        fresh = self._spawn()
        self.workers[self.workers.index(w)] = fresh
        return fresh

    def _discard(self, w: _Worker) -> None:
        for fd in (w.conn.fileno(), w.proc.sentinel):
            if self._fds.pop(fd, None) is not None:
                self._poller.unregister(fd)
        w.tasks.cancel_join_thread()
        w.tasks.close()
        w.conn.close()

    def close(self) -> None:
        for w in self.workers:
            try:
                w.tasks.put(None)
            except (OSError, ValueError):
                pass
        deadline = time.monotonic() + 5
        for w in self.workers:
            w.proc.join(max(0.0, deadline - time.monotonic()))
            if w.proc.is_alive():
                w.proc.kill()
                w.proc.join()
            self._discard(w)
        self.workers = []

    def abort(self) -> None:
        for w in self.workers:
            w.proc.kill()
        for w in self.workers:
            w.proc.join()
            self._discard(w)
        self.workers = []


class _Dask:
    """The same work on a Dask cluster.  Entries travel with their bytes, so
    workers need bondcheck installed but no access to the files.

    A Dask worker runs tasks in threads, which cannot be killed: an entry
    that overruns ``timeout`` gets its ``timeout`` row and its task is
    cancelled, but the thread computing it runs on until the check returns.
    The start of a task is taken from the scheduler (polled twice a second),
    so timeouts are approximate."""

    def __init__(self, job: tuple, client, timeout: float | None, chunk: int):
        self.job, self.client, self.timeout = job, client, timeout
        nthreads = sum(client.nthreads().values()) or 1
        self.nworkers = nthreads
        self.chunk = 1 if timeout is not None else max(1, chunk)
        self.limit = 2 * nthreads
        self.futures: dict = {}       # future -> chunk of entries
        self.started: dict = {}       # key -> monotonic time it was first seen running
        self._polled = 0.0

    @property
    def busy(self) -> bool:
        return bool(self.futures)

    def fill(self, take: Callable[[], Entry | None]) -> None:
        while len(self.futures) < self.limit:
            chunk = _take_chunk(take, self.chunk)
            if not chunk:
                return
            fut = self.client.submit(_check_chunk, chunk, self.job, pure=False)
            self.futures[fut] = chunk

    def poll(self, wait: float) -> list[Completion]:
        from distributed import wait as dask_wait

        done: list[Completion] = []
        try:
            finished, _ = dask_wait(list(self.futures), timeout=wait, return_when="FIRST_COMPLETED")
        except Exception as exc:  # nothing finished in time (a TimeoutError of some kind)
            if "timeout" not in type(exc).__name__.lower():
                raise
            finished = set()
        for fut in finished:
            chunk = self.futures.pop(fut)
            self.started.pop(str(fut.key), None)
            if fut.status == "finished":
                bys = {e.seq: e for e in chunk}
                for seq, *answer in fut.result():
                    done.append((bys[seq], *answer))
            else:
                try:
                    err = fut.exception()
                    msg = f"{type(err).__name__}: {err}"
                except Exception as exc:
                    msg = f"{type(exc).__name__}: {exc}"
                for e in chunk:
                    done.append((e, CRASH, _failed_rows(f"the cluster could not check this entry ({msg})"), None, None))
        if self.timeout is not None and self.futures:
            self._overdue(done)
        return done

    def _overdue(self, done: list[Completion]) -> None:
        now = time.monotonic()
        if now - self._polled >= 0.5:
            self._polled = now
            running = {str(k) for keys in self.client.processing().values() for k in keys}
            for fut in self.futures:
                k = str(fut.key)
                if k in running and k not in self.started:
                    self.started[k] = now
        for fut in list(self.futures):
            t = self.started.get(str(fut.key))
            if t is not None and now - t > self.timeout:
                chunk = self.futures.pop(fut)
                self.started.pop(str(fut.key), None)
                fut.cancel()
                for e in chunk:
                    done.append((e, "timeout", _timeout_rows(self.timeout, now - t), None, None))

    def close(self) -> None:
        for fut in self.futures:
            fut.cancel()
        self.futures.clear()

    abort = close


# --------------------------------------------------------------------------
# the scan loop
# --------------------------------------------------------------------------


def _give_back_memory() -> None:
    """Return freed heap to the system (glibc only).  The main process frees
    every row it passes on, but glibc keeps the freed blocks of the many
    mid-sized ones, and a long scan's resident memory would creep up by some
    hundred bytes per entry without this."""
    global _TRIM
    if _TRIM is None:
        try:
            import ctypes

            _TRIM = ctypes.CDLL("libc.so.6").malloc_trim
        except (OSError, AttributeError):
            _TRIM = False
    if _TRIM:
        _TRIM(0)


_TRIM = None


class Scanner:
    """Runs a scan; iterate :meth:`rows` for the result rows as they come.

    Counters: ``entries`` (seen), ``checked`` (answered by a worker), ``reused``
    (answered from the store), ``copies`` (identical content checked once in
    this scan), ``failed`` (could not be opened).

    With ``full_rows=False`` freshly checked rows carry only what a summary
    needs (``BRIEF_KEYS``, findings without sites and evidence, and entry,
    path, hash); their complete JSON text is in ``row.json``.  That spares
    the main process unpickling the per-site tables it would not use."""

    def __init__(self, inputs: Iterable[str], options=None, *, jobs: int | None = None,
                 timeout: float | None = None, store: str | Store | None = None,
                 executor: str = "process", scheduler: str | None = None, client=None,
                 chunk: int = DEFAULT_CHUNK, retry_failed: bool = False, full_rows: bool = True,
                 limits=None):
        from .api import Options
        from .limits import current

        self.inputs = [os.fspath(i) for i in inputs]
        # A scan groups atoms into sites by environment unless told otherwise
        # (Options(symmetry=True)): the same verdicts and electron counts at
        # nearly three times the speed, without space groups or Wyckoff letters.
        self.options = options or Options(symmetry=False)
        self.okey = settings_key(self.options)
        # the limits in force here (bondcheck.limits) go to the workers too
        self.limits = limits or current()
        self.job = (self.options, full_rows, self.limits, store is not None)
        self.jobs = default_jobs() if not jobs else int(jobs)
        self.timeout = float(timeout) if timeout else None
        self.executor_name = executor
        self.scheduler, self.client = scheduler, client
        self.chunk = chunk
        self.retry_failed = retry_failed
        self._own_store = isinstance(store, (str, os.PathLike))
        self.store = Store(store) if self._own_store else store
        self.entries = self.checked = self.reused = self.copies = self.failed = 0
        self.started = self.finished = 0.0
        self.interrupted = False
        self.nworkers = 0
        self._ready: deque[dict] = deque()
        self._inflight: dict[str, list[Entry]] = {}
        self._exhausted = False

    # -- pieces -------------------------------------------------------------

    def _executor(self):
        if self.executor_name == "inline":
            return _Inline(self.job)
        if self.executor_name == "process":
            return _Processes(self.job, self.jobs, self.timeout, self.chunk)
        if self.executor_name == "dask":
            client = self.client
            if client is None:
                from distributed import Client

                if not self.scheduler:
                    raise ValueError("--executor dask needs --scheduler ADDRESS")
                client = self.client = Client(self.scheduler)
                self._own_client = True
            return _Dask(self.job, client, self.timeout, self.chunk)
        raise ValueError(f"unknown executor {self.executor_name!r} (process, inline or dask)")

    def _usable(self, hit) -> bool:
        status, stored_timeout, _ = hit
        if status == "timeout":
            if self.retry_failed or self.timeout is None:
                return False
            return self.timeout <= (stored_timeout or 0.0)
        if status == "error" and self.retry_failed:
            return False
        return True

    def _take(self, source: Iterator[Entry]) -> Callable[[], Entry | None]:
        """The next entry to check from `source`, None when there is none
        (yet).  To be called with the scan's limits applied: the enumeration
        reads archives and files under them."""

        def take() -> Entry | None:
            if len(self._ready) >= 2000:  # let the rows out before reading on
                return None
            for e in source:
                self.entries += 1
                e.seq = self.entries
                if e.error:  # could not be opened: a row, and in the store for its summary
                    self.failed += 1
                    rows = _failed_rows(e.error)
                    digest = "-" + hashlib.blake2b(e.error.encode(), digest_size=15).hexdigest()
                    if self.store is not None:
                        self.store.put(digest, self.okey, e.id, "error", rows)
                    self._ready.extend(specific(rows, e.id, digest))
                    continue
                digest = e.content_hash()
                if self.store is not None:
                    hit = self.store.get(digest, self.okey)
                    if hit is not None and self._usable(hit):
                        self.reused += 1
                        self.store.link(digest, self.okey, e.id)
                        self._ready.extend(specific(hit[2], e.id, digest))
                        if len(self._ready) >= 2000:
                            return None
                        continue
                waiting = self._inflight.get(digest)
                if waiting is not None:
                    self.copies += 1
                    waiting.append(e)
                    continue
                self._inflight[digest] = [e]
                return e
            self._exhausted = True
            return None

        return take

    def _finish(self, e: Entry, status: str, rows: list[dict], blob: bytes | None = None,
                texts: list[str] | None = None) -> None:
        digest = e.digest
        same = self._inflight.pop(digest, [e])
        self.checked += 1
        if self.store is not None and status != CRASH:
            self.store.put(digest, self.okey, e.id, status, rows, self.timeout if status == "timeout" else None,
                           blob=blob)
            for other in same[1:]:
                self.store.link(digest, self.okey, other.id)
        for other in same:
            self._ready.extend(specific(rows, other.id, digest, texts))

    # -- the loop -----------------------------------------------------------

    def leftover(self) -> Iterator[dict]:
        """After an interruption: rows that were finished, and are in the
        store, but had not been handed out by :meth:`rows`."""
        while self._ready:
            yield self._ready.popleft()

    def rows(self, tick: float = 0.2) -> Iterator[dict]:
        """Result rows, one per structure (one per entry that could not be
        read), in the order they are finished."""
        from .limits import applied

        self.started = time.time()
        t0 = time.perf_counter()
        run = self.store.start_run(self.okey, self.inputs, self.jobs) if self.store is not None else None
        source = iter_entries(self.inputs)
        take = self._take(source)
        ex = None
        clean = False
        try:
            while ex is None:  # start workers only once there is work for them
                with applied(self.limits):
                    first = take()
                while self._ready:
                    yield self._ready.popleft()
                if first is not None:
                    ex = self._executor()
                    self.nworkers = ex.nworkers
                    held = [first]

                    def take_held(held=held) -> Entry | None:
                        return held.pop() if held else take()
                elif self._exhausted:
                    break
            while ex is not None:
                with applied(self.limits):
                    ex.fill(take_held)
                while self._ready:
                    yield self._ready.popleft()
                if not ex.busy:
                    if self._exhausted:
                        break
                    continue
                for done in ex.poll(tick):
                    self._finish(*done)
                    if self.checked % 5000 == 0:
                        _give_back_memory()
                while self._ready:
                    yield self._ready.popleft()
            clean = True
        except BaseException:
            self.interrupted = True
            raise
        finally:
            if ex is not None:
                (ex.close if clean else ex.abort)()
            self.finished = time.time()
            self.wall = time.perf_counter() - t0
            if self.store is not None:
                self.store.finish_run(run, entries=self.entries, checked=self.checked, reused=self.reused,
                                      wall=self.wall, interrupted=self.interrupted)
                if self._own_store:
                    self.store.close()
            if getattr(self, "_own_client", False):
                self.client.close()
            source.close()


# --------------------------------------------------------------------------
# output files
# --------------------------------------------------------------------------

LIST_KEYS = ("causes", "cations", "anions")
FLOAT_KEYS = ("vec_anion", "aa_predicted", "aa_observed", "cc_observed", "residual",
              "electrons_per_formula", "anions_per_formula", "seconds", "entry_seconds")
JSON_KEYS = ("findings", "sites")
NULLABLE_KEYS = ("error", "verdict")


class _JsonlWriter:
    def __init__(self, path: str):
        self.fh = sys.stdout if path == "-" else open(path, "w", encoding="utf-8")

    def write(self, row: dict) -> None:
        text = getattr(row, "json", None)
        if text is None:
            text = _row_text(row)
        self.fh.write(text + "\n")

    def close(self) -> None:
        if self.fh is sys.stdout:
            self.fh.flush()
        else:
            self.fh.close()


def _flat_value(key: str, v):
    if key in LIST_KEYS and isinstance(v, list):
        return ";".join(map(str, v))
    if isinstance(v, (list, dict)):
        return json.dumps(v, separators=(",", ":"), allow_nan=False)
    return v


class _CsvWriter:
    """One line per row; causes, cations and anions joined with ';', findings
    and sites as JSON text."""

    def __init__(self, path: str):
        import csv

        self.fh = open(path, "w", encoding="utf-8", newline="")
        self.csv = csv
        self.writer = None

    def write(self, row: dict) -> None:
        if self.writer is None:
            self.writer = self.csv.DictWriter(self.fh, fieldnames=list(row), extrasaction="ignore")
            self.writer.writeheader()
        self.writer.writerow({k: _flat_value(k, v) for k, v in row.items()})

    def close(self) -> None:
        self.fh.close()


class _ParquetWriter:
    """Row groups of a few thousand rows; lists stay lists, findings are a
    list of structs (evidence as JSON text), sites are JSON text."""

    BATCH = 2000

    def __init__(self, path: str):
        self.path = path
        self.buf: list[dict] = []
        self.writer = None
        self.schema = None

    def _make_schema(self, row: dict):
        import pyarrow as pa

        fields = []
        finding = pa.struct([("slug", pa.string()), ("severity", pa.string()), ("message", pa.string()),
                             ("sites", pa.list_(pa.string())), ("evidence", pa.string())])
        for k in row:
            if k in LIST_KEYS:
                t = pa.list_(pa.string())
            elif k in FLOAT_KEYS:
                t = pa.float64()
            elif k == "findings":
                t = pa.list_(finding)
            else:
                t = pa.string()
            fields.append((k, t))
        return pa.schema(fields)

    def _convert(self, row: dict) -> dict:
        out = {}
        for k in self.schema.names:
            v = row.get(k)
            if k == "findings":
                v = [{"slug": f.get("slug"), "severity": f.get("severity"), "message": f.get("message"),
                      "sites": [str(s) for s in f.get("sites") or []],
                      "evidence": json.dumps(f.get("evidence") or {}, separators=(",", ":"), allow_nan=False)}
                     for f in v or []]
            elif k in LIST_KEYS:
                v = [str(x) for x in v or []]
            elif k in FLOAT_KEYS:
                v = None if v is None else float(v)
            elif v is not None and not isinstance(v, str):
                v = json.dumps(v, separators=(",", ":"), allow_nan=False) if isinstance(v, (list, dict)) else str(v)
            out[k] = v
        return out

    def write(self, row: dict) -> None:
        if self.schema is None:
            self.schema = self._make_schema(row)
        self.buf.append(self._convert(row))
        if len(self.buf) >= self.BATCH:
            self._flush()

    def _flush(self) -> None:
        import pyarrow as pa
        import pyarrow.parquet as pq

        if not self.buf:
            return
        if self.writer is None:
            self.writer = pq.ParquetWriter(self.path, self.schema)
        self.writer.write_table(pa.Table.from_pylist(self.buf, schema=self.schema))
        self.buf = []

    def close(self) -> None:
        self._flush()
        if self.writer is not None:
            self.writer.close()
        elif self.schema is None:  # no rows: still leave a readable file
            import pyarrow as pa
            import pyarrow.parquet as pq

            pq.write_table(pa.table({"entry": pa.array([], pa.string())}), self.path)


def open_writer(path: str):
    """A streaming writer for a results file, chosen by suffix:
    .jsonl (or '-' for standard output), .csv, .parquet."""
    low = path.lower()
    if path == "-" or low.endswith((".jsonl", ".ndjson")):
        return _JsonlWriter(path)
    if low.endswith(".csv"):
        return _CsvWriter(path)
    if low.endswith((".parquet", ".pq")):
        return _ParquetWriter(path)
    raise ValueError(f"cannot tell the format of {path!r}: use .jsonl, .csv or .parquet")


# --------------------------------------------------------------------------
# reading results back
# --------------------------------------------------------------------------


def read_rows(path: str) -> Iterator[dict]:
    """Rows of a results file (.jsonl, .csv, .parquet) or of a results store
    (SQLite, the last run's settings), one at a time."""
    low = path.lower()
    if low.endswith((".jsonl", ".ndjson")):
        with open(path, encoding="utf-8") as fh:
            for line in fh:
                if line.strip():
                    yield json.loads(line)
    elif low.endswith(".csv"):
        yield from _read_csv(path)
    elif low.endswith((".parquet", ".pq")):
        import pyarrow.parquet as pq

        for batch in pq.ParquetFile(path).iter_batches(batch_size=4096):
            for row in batch.to_pylist():
                for f in row.get("findings") or []:
                    if isinstance(f.get("evidence"), str):
                        f["evidence"] = json.loads(f["evidence"])
                if isinstance(row.get("sites"), str):
                    row["sites"] = json.loads(row["sites"])
                yield row
    else:
        with open(path, "rb") as fh:
            head = fh.read(16)
        if head != b"SQLite format 3\x00":
            raise ValueError(f"cannot tell the format of {path!r}: use .jsonl, .csv, .parquet or a results store")
        store = Store(path)
        try:
            yield from store.iter_rows()
        finally:
            store.close()


def _read_csv(path: str) -> Iterator[dict]:
    import csv

    with open(path, encoding="utf-8", newline="") as fh:
        for rec in csv.DictReader(fh):
            row: dict = {}
            for k, v in rec.items():
                if k in LIST_KEYS:
                    row[k] = [x for x in v.split(";") if x]
                elif k in FLOAT_KEYS:
                    row[k] = float(v) if v not in ("", None) else None
                elif k in JSON_KEYS:
                    row[k] = json.loads(v) if v else []
                elif k in NULLABLE_KEYS:
                    row[k] = v if v != "" else None
                else:
                    row[k] = v
            yield row


# --------------------------------------------------------------------------
# summary
# --------------------------------------------------------------------------


def worth_a_look(row: dict) -> tuple[float, str]:
    """(score, reason) of a row; 0 when nothing asks for a look.  Findings
    that point at a wrong structure come first, then error-severity findings,
    entries that could not be checked, and warnings; a mismatch adds a little."""
    score, reason = 0.0, ""
    if row.get("status") in ("error", "timeout"):
        score, reason = FAILED_SCORE, f"{row['status']}: {row.get('error') or ''}"
    findings = row.get("findings") or ()
    named = None  # the finding with the highest score, if it beats the status
    for f in findings:
        s = PRIORITY_SLUGS.get(f.get("slug"), SEVERITY_SCORE.get(f.get("severity"), 0.0))
        if s > score:
            score, named = s, f
    # Findings come most likely cause first: among the structure-level
    # findings, name the one the diagnosis ranks highest.
    named = next((f for f in findings if f.get("slug") in PRIORITY_SLUGS), named)
    if named is not None:
        reason = f"{named.get('slug')}: {named.get('message') or ''}"
    if score and row.get("verdict") == "mismatch":
        score += MISMATCH_BONUS
    return score, reason


class Tally:
    """Everything the summary needs, kept in bounded memory."""

    def __init__(self, top: int = 15):
        self.top = top
        self.rows = 0
        self.entries = 0
        self.status: Counter = Counter()
        self.verdicts: Counter = Counter()
        self.causes: Counter = Counter()
        self.findings: Counter = Counter()
        self.check_seconds = 0.0
        self._look: list = []      # min-heap of (score, |residual|, path, (verdict, reason))
        self._slow: list = []      # min-heap of (seconds, n, entry)
        self._last_entry = None
        self._n = 0
        self.wall: float | None = None
        self.jobs: int | None = None
        self.reused = self.checked = 0
        self.interrupted = False

    def add(self, row: dict) -> None:
        get = row.get
        self.rows += 1
        self._n += 1
        st = get("status") or "ok"
        self.status[st] += 1
        findings = get("findings")
        if st == "ok":
            self.verdicts[get("verdict") or "none"] += 1
            for c in get("causes") or ():
                self.causes[c] += 1
            if findings:
                counts = self.findings
                for f in findings:
                    counts[f.get("slug")] += 1
        entry = get("entry") or get("path")
        if entry != self._last_entry:
            self._last_entry = entry
            self.entries += 1
            es = float(get("entry_seconds") or 0.0)
            self.check_seconds += es
            item = (es, self._n, entry)
            if len(self._slow) < self.top:
                heapq.heappush(self._slow, item)
            elif item > self._slow[0]:
                heapq.heapreplace(self._slow, item)
        if st == "ok" and not findings:
            return  # nothing asks for a look (see worth_a_look)
        score, reason = worth_a_look(row)
        if score > 0:
            resid = get("residual")
            tb = abs(resid) if isinstance(resid, (int, float)) else 0.0
            path = str(get("path") or entry)
            item = (score, tb, path, (get("verdict") or st, reason))
            if len(self._look) < self.top:
                heapq.heappush(self._look, item)
            elif item > self._look[0]:
                heapq.heapreplace(self._look, item)

    @property
    def looks(self) -> list[dict]:
        return [{"path": p, "verdict": v, "score": s, "reason": r}
                for s, _, p, (v, r) in sorted(self._look, key=lambda t: (-t[0], -t[1], t[2]))]

    @property
    def slowest(self) -> list[dict]:
        return [{"entry": e, "seconds": s} for s, _, e in sorted(self._slow, reverse=True)]

    def to_dict(self) -> dict:
        from .render.text import CAUTION

        d = {
            "entries": self.entries,
            "structures": self.rows,
            "status": dict(self.status),
            "verdicts": dict(self.verdicts),
            "causes": dict(self.causes.most_common()),
            "findings": dict(self.findings.most_common()),
            "worth_a_look": self.looks,
            "slowest": self.slowest,
            "check_seconds": round(self.check_seconds, 3),
            "entries_per_check_second": round(self.entries / self.check_seconds, 2) if self.check_seconds else None,
            "caution": CAUTION,
        }
        if self.wall is not None:
            d.update(wall_seconds=round(self.wall, 3), jobs=self.jobs, checked=self.checked, reused=self.reused,
                     entries_per_second=round(self.entries / self.wall, 2) if self.wall else None,
                     interrupted=self.interrupted)
        return d


def summarize(path: str, top: int = 15) -> Tally:
    t = Tally(top)
    for row in read_rows(path):
        t.add(row)
    return t


def _short(text: str, width: int) -> str:
    text = " ".join(str(text).split())
    return text if len(text) <= width else text[: width - 3] + "..."


def render_summary(t: Tally) -> str:
    from .render.text import CAUTION

    out = []
    head = f"{t.entries} entries, {t.rows} structure rows"
    if t.wall is not None:
        head += f" in {t.wall:.1f} s with {t.jobs} worker(s)"
        if t.wall > 0:
            head += f": {t.entries / t.wall:.1f} entries/s"
        head += f" ({t.checked} checked, {t.reused} taken from the store)"
        if t.interrupted:
            head += " [interrupted: run the same command again to resume]"
    out.append(head)
    if t.check_seconds and t.entries:
        out.append(f"check time {t.check_seconds:.1f} s in all, {1000 * t.check_seconds / t.entries:.1f} ms per entry "
                   f"({t.entries / t.check_seconds:.1f} entries/s per worker)")

    def block(title: str, counter: Counter, limit: int | None = None) -> None:
        if not counter:
            return
        out.append("")
        out.append(title)
        items = counter.most_common(limit)
        w = max(len(str(k)) for k, _ in items)
        for k, v in items:
            out.append(f"  {str(k):<{w}}  {v:>8}")

    block("status", t.status)
    block("verdict (structures read)", t.verdicts)
    block("causes", t.causes, 20)
    if t.looks:
        out.append("")
        out.append("worth a look")
        for i, d in enumerate(t.looks, 1):
            out.append(f"  {i:>2}. {d['path']}  [{d['verdict']}]")
            out.append(f"      {_short(d['reason'], 110)}")
    if t.slowest and t.entries:
        out.append("")
        out.append("slowest entries")
        for d in t.slowest[:10]:
            out.append(f"  {d['seconds']:8.3f} s  {d['entry']}")
    out.append("")
    out.append(CAUTION)
    return "\n".join(out) + "\n"


# --------------------------------------------------------------------------
# the whole thing
# --------------------------------------------------------------------------


def _show_progress(flag: bool | None) -> bool:
    if flag is not None:
        return flag
    if os.environ.get("CI", "").lower() in ("1", "true", "yes"):
        return False
    return sys.stderr.isatty()


class _Progress:
    """A rich progress line on standard error: entries done (of how many,
    once a background count has finished), entries/s, time left, and running
    counts per verdict.  On a terminal narrower than WIDE columns the bar is
    shorter and the counts are those a curator watches for (mismatch, error,
    timeout), so that the line keeps its count, rate and time left instead of
    rich cutting them short; the summary at the end has every count."""

    WIDE = 110

    def __init__(self, inputs: list[str], console=None):
        import threading

        from rich.console import Console
        from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn

        console = console or Console(stderr=True)
        self.narrow = console.width < self.WIDE
        self.progress = Progress(
            TextColumn("[bold]scan"), BarColumn(bar_width=12 if self.narrow else 40), MofNCompleteColumn(),
            TextColumn("{task.fields[rate]}"), TimeRemainingColumn(), TextColumn("{task.fields[counts]}"),
            console=console, transient=False, refresh_per_second=4)
        self.task = self.progress.add_task("scan", total=None, rate="", counts="")
        self.t0 = time.perf_counter()
        self.last = 0.0
        self.progress.start()
        self._total: int | None = None

        def count():
            from .sources import count_entries

            try:
                self._total = count_entries(inputs)
            except Exception:
                self._total = None

        self.counter = threading.Thread(target=count, daemon=True, name="bondcheck-count")
        self.counter.start()

    def update(self, tally: Tally, force: bool = False) -> None:
        now = time.perf_counter()
        if not force and now - self.last < 0.25:
            return
        self.last = now
        dt = now - self.t0
        unit = "/s" if self.narrow else " entries/s"
        rate = f"{tally.entries / dt:,.0f}{unit}" if dt > 0 else ""
        c = tally.verdicts
        shown = ("mismatch",) if self.narrow else ("consistent", "mismatch", "not-applicable")
        parts = [f"{k} {c[k]:,}" for k in shown if c.get(k)]
        parts += [f"{k} {tally.status[k]:,}" for k in ("error", "timeout") if tally.status.get(k)]
        kw = {"total": self._total} if self._total is not None else {}
        self.progress.update(self.task, completed=tally.entries, rate=rate, counts=" ".join(parts), **kw)

    def close(self, tally: Tally) -> None:
        self.update(tally, force=True)
        self.progress.stop()


def scan(inputs: Iterable[str], options=None, *, out: Iterable[str] = (), store: str | None = DEFAULT_STORE,
         jobs: int | None = None, timeout: float | None = None, executor: str = "process",
         scheduler: str | None = None, client=None, chunk: int = DEFAULT_CHUNK, retry_failed: bool = False,
         progress: bool | None = None, top: int = 15, limits=None) -> Tally:
    """Scan the inputs; write the rows to each file in ``out`` and return the
    :class:`Tally` (``tally.interrupted`` is set when Ctrl-C stopped it; the
    files written so far are complete and the store resumes the scan)."""
    inputs = list(inputs)
    writers = [open_writer(p) for p in out]
    sc = Scanner(inputs, options, jobs=jobs, timeout=timeout, store=store, executor=executor,
                 scheduler=scheduler, client=client, chunk=chunk, retry_failed=retry_failed,
                 full_rows=any(not isinstance(w, _JsonlWriter) for w in writers), limits=limits)
    tally = Tally(top)
    bar = _Progress(inputs) if _show_progress(progress) else None
    rows = sc.rows()
    try:
        for row in rows:
            tally.add(row)
            for w in writers:
                w.write(row)
            if bar is not None:
                bar.update(tally)
    except KeyboardInterrupt:
        tally.interrupted = True
    finally:
        rows.close()
        if tally.interrupted:
            # rows finished (and stored) before the interruption but not yet
            # handed out go to the outputs too: the files hold what the store does
            for row in sc.leftover():
                tally.add(row)
                for w in writers:
                    w.write(row)
        if bar is not None:
            bar.close(tally)
        for w in writers:
            w.close()
    tally.wall, tally.jobs = sc.wall, sc.nworkers or sc.jobs
    tally.checked, tally.reused = sc.checked, sc.reused
    tally.interrupted = tally.interrupted or sc.interrupted
    return tally
