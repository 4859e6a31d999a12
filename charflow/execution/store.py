"""The result store: one SQLite database per run folder, one row per measured point.

A row's key is a content hash of everything that decides the point's result: the rendered
testbench, the bytes of every model file it reads (followed through ``.include`` and ``.lib``),
the simulator and its version (``provenance.simulator``, read without loading the simulator
here), charflow's measurement settings and thresholds, and the point
itself. A point whose key is stored is not simulated again; tables and writers are rebuilt
from the rows. Each row also has a slot, the hash of the library name and the point alone,
so that a run of a few arcs can fill the rest of its library from older rows and say which
of them are older than the current models.

The database is in WAL mode and every row is committed as its point finishes, so a run that
is killed loses only the points in flight. Only the driver writes; workers return
measurements.
"""

from __future__ import annotations

import dataclasses
import functools
import hashlib
import json
import os
import sqlite3
import types
import typing
from collections.abc import Iterable, Iterator, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from charflow import __version__
from charflow.config.library import LibraryConfig
from charflow.execution import provenance
from charflow.execution.provenance import file_digest
from charflow.records.errors import StoreError
from charflow.records.outcomes import Outcome, Result
from charflow.records.points import METHOD_REVISION, TIGHT_RELTOL, TIGHT_STEPS, Work
from charflow.simulation.netlist import Deck, model_files, repoint_reads

FILE_NAME = "store.sqlite"
# The result records a row may hold, by name; any point type and any of these records work.
RECORDS: dict[str, type] = {cls.__name__: cls for cls in typing.get_args(Result)}
SCHEMA = 1  # PRAGMA user_version of a database this module writes
BATCH = 500  # keys per SELECT ... IN (...): below SQLite's limit on bound parameters
# Seconds a write waits for another connection's write to the same store to end (SQLite's
# busy timeout: writers take turns, readers never wait in WAL mode) before it gives up.
BUSY_TIMEOUT = 30.0

_TABLES = """
CREATE TABLE IF NOT EXISTS point (
    key TEXT PRIMARY KEY,       -- content hash of every input of the result
    slot TEXT NOT NULL,         -- hash of the library name and the point alone
    library TEXT NOT NULL,
    cell TEXT NOT NULL,
    label TEXT NOT NULL,        -- the point in words, for people reading the database
    models TEXT NOT NULL,       -- JSON [[name, sha256], ...] of the model files read
    record TEXT NOT NULL,       -- the result's record type: Measurement, SearchResult
    result TEXT NOT NULL        -- JSON of the record's fields but its point
);
CREATE INDEX IF NOT EXISTS point_slot ON point (slot);
CREATE TABLE IF NOT EXISTS verified (key TEXT PRIMARY KEY);
"""


@dataclass(frozen=True, slots=True)
class CellInputs:
    """What a cell's results depend on, apart from the point."""

    digest: str  # hash of the testbench, models, simulator and settings together
    # (name relative to the config's folder, sha256) of every model file read
    models: tuple[tuple[str, str | None], ...]


@dataclass(frozen=True, slots=True)
class Keyring:
    """The keys and slots of one library's points."""

    library: str
    cells: dict[str, CellInputs]

    def key(self, point: Work) -> str:
        return _hash_with(self.cells[point.cell].digest, point)

    def slot(self, point: Work) -> str:
        return _hash_with(self.library, point)


@dataclass(frozen=True, slots=True)
class Stale:
    """A point served from a row whose inputs are not the current ones."""

    point: Work
    models: tuple[str, ...]  # names of the model files changed since; () if something else did

    @property
    def reason(self) -> str:
        if self.models:
            return f"model file {', '.join(self.models)} changed"
        return "the testbench or the settings changed"


def keyring(
    config: LibraryConfig, decks: Mapping[str, Deck], scheduler: str | None = None
) -> Keyring:
    """Keys for the points of ``decks``' cells, from the files and settings as they are now.

    A key holds no path: the testbench enters with each file it reads named relative to the
    config's folder, and the files by content, so the same library in another folder, or run
    on a cluster (``scheduler``), meets the same rows.
    """
    simulator = provenance.simulator(config, scheduler=scheduler)  # asked once per process
    sim = dataclasses.asdict(config.simulation)
    del sim["timeout"]  # how long a run may take does not change what it measures
    settings = {
        "charflow": __version__,
        "method": METHOD_REVISION,
        "thresholds": dataclasses.asdict(config.thresholds),
        "simulation": sim,
        "vdd": config.process.vdd,
        # The tightened settings flip-flop checks and error bars are measured at.
        "tightened": [TIGHT_STEPS, TIGHT_RELTOL],
        # A schema change of a record (new fields) makes every stored row stale.
        "records": {n: [f.name for f in dataclasses.fields(c)] for n, c in RECORDS.items()},
    }
    shape = config.input_shape
    if not shape.linear:
        # Every input's waveform: results of one shape never serve another (nor the ramp).
        settings["input_shape"] = [shape.kind, _plain(shape.rise), _plain(shape.fall)]
    digests: dict[Path, str | None] = {}
    names: dict[Path, str] = {}  # each file's name relative to the config's folder
    written: dict[str, str | None] = {}  # the same by the name a deck gives it
    cells = {}
    for name, deck in decks.items():
        files = model_files(deck.text, Path.cwd())
        for path in files:
            if path not in digests:
                digests[path] = file_digest(path)
                names[path] = Path(os.path.relpath(path, config.path.parent)).as_posix()
        models = tuple((names[p], digests[p]) for p in files)
        testbench = _hash([deck.compat, _named(deck.text, names, written)])
        context = _cell_context(config, name)
        digest = _hash([testbench, models, simulator.key, settings, context])
        cells[name] = CellInputs(digest, models)
    return Keyring(config.name, cells)


def _named(text: str, names: Mapping[Path, str], written: dict[str, str | None]) -> str:
    """``text`` with each file it reads given by its name in ``names`` (its path otherwise);
    ``written`` keeps what each name as written resolved to, for the next deck."""

    def to(name: str) -> str | None:
        if name not in written:
            written[name] = names.get((Path.cwd() / name).resolve())
        return written[name]

    return repoint_reads(text, to)


def _cell_context(config: LibraryConfig, name: str) -> object:
    """What a point reads from its cell's description besides the testbench and itself: the
    grid (the first step of a transient comes from probes at its corners, ``stepsize``, and
    its stop time is capped by the largest slew) and, for a flip-flop, its description."""
    cell = config.cell(name)
    return [_plain(cell.grid), repr(cell.flop)]


class Store:
    """The SQLite database of one run folder; use as a context manager."""

    def __init__(self, path: str | Path, *, timeout: float = BUSY_TIMEOUT) -> None:
        self.path = Path(path)
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            self._db = sqlite3.connect(self.path, timeout=timeout)
        except (OSError, sqlite3.Error) as exc:
            raise StoreError(f"cannot open the result store: {exc}", file=self.path) from exc
        try:
            self._prepare()
        except BaseException:
            self._db.close()
            raise

    def _prepare(self) -> None:
        try:
            version = self._db.execute("PRAGMA user_version").fetchone()[0]
            if version not in (0, SCHEMA):
                raise StoreError(
                    f"the store has schema {version}, this charflow writes {SCHEMA}; "
                    "move it away to start a new one",
                    file=self.path,
                )
            mode = self._db.execute("PRAGMA journal_mode=WAL").fetchone()[0]
            if mode.lower() != "wal":
                raise StoreError(
                    f"cannot switch the store to WAL mode (got {mode})", file=self.path
                )
            # In WAL mode a commit survives the process being killed without syncing each one.
            self._db.execute("PRAGMA synchronous=NORMAL")
            with self._db:
                self._db.executescript(_TABLES)
                self._db.execute(f"PRAGMA user_version={SCHEMA}")
        except sqlite3.Error as exc:
            raise StoreError(f"cannot open the result store: {exc}", file=self.path) from exc

    def __enter__(self) -> Store:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        self._db.close()

    def count(self) -> int:
        return self._query("SELECT count(*) FROM point").fetchone()[0]

    def lookup(self, ring: Keyring, points: Iterable[Work]) -> dict[Work, Outcome]:
        """The stored results of those ``points`` whose key is stored."""
        by_key = {ring.key(p): p for p in points}
        found: dict[Work, Outcome] = {}
        query = "SELECT key, record, result FROM point WHERE key IN"
        for key, record, text in self._rows(query, by_key):
            m = _decode(record, by_key[key], text)
            if m is not None:
                found[m.point] = m
        return found

    def latest(
        self, ring: Keyring, points: Iterable[Work]
    ) -> tuple[dict[Work, Outcome], dict[Work, Stale]]:
        """Every point's result, from its current key or else from the newest row of its slot;
        the second mapping says which came from older inputs and why."""
        points = list(points)
        found = self.lookup(ring, points)
        by_slot = {ring.slot(p): p for p in points if p not in found}
        stale: dict[Work, Stale] = {}
        query = "SELECT slot, models, record, result FROM point WHERE slot IN"
        for slot, models, record, text in self._rows(query, by_slot, order="rowid"):
            point = by_slot[slot]
            m = _decode(record, point, text)
            if m is not None:  # newer rows come later and replace older ones
                found[point] = m
                stale[point] = _why(point, json.loads(models), ring.cells[point.cell].models)
        return found, stale

    def put(self, ring: Keyring, m: Result) -> None:
        """Store one result (a record of ``RECORDS``), committed at once."""
        self.put_all(ring, (m,))

    def put_all(self, ring: Keyring, results: Iterable[Result]) -> None:
        """Store ``results`` in one transaction, committed at once (one commit a batch of a
        worker's outcomes, not a row); on a full disk row by row, so that as many of them are
        kept as there is room for before the error."""
        rows = [
            (
                ring.key(m.point),
                ring.slot(m.point),
                ring.library,
                m.point.cell,
                m.point.label,
                json.dumps(ring.cells[m.point.cell].models),
                type(m).__name__,
                _encode(m),
            )
            for m in results
        ]
        sql = "INSERT OR REPLACE INTO point VALUES (?, ?, ?, ?, ?, ?, ?, ?)"
        try:
            if rows:
                self._write(sql, rows)
        except StoreError as exc:
            if getattr(exc.__cause__, "sqlite_errorcode", None) != sqlite3.SQLITE_FULL:
                raise
            for row in rows:  # a full disk: keep as many of the batch as there is room for
                self._write(sql, [row])

    def verified(self, ring: Keyring, cell: str) -> bool:
        """Whether the cell's function check passed with the current inputs."""
        query = "SELECT 1 FROM verified WHERE key = ?"
        return self._query(query, (ring.cells[cell].digest,)).fetchone() is not None

    def mark_verified(self, ring: Keyring, cell: str) -> None:
        self._write("INSERT OR IGNORE INTO verified VALUES (?)", [(ring.cells[cell].digest,)])

    def _query(self, sql: str, args: tuple = ()) -> sqlite3.Cursor:
        try:
            return self._db.execute(sql, args)
        except sqlite3.Error as exc:
            raise StoreError(f"cannot read the result store: {exc}", file=self.path) from exc

    def _rows(
        self, sql: str, keys: Mapping[str, object], order: str | None = None
    ) -> Iterator[Any]:
        ordered = list(keys)
        for i in range(0, len(ordered), BATCH):
            part = ordered[i : i + BATCH]
            text = f"{sql} ({', '.join('?' * len(part))})"
            yield from self._query(text + (f" ORDER BY {order}" if order else ""), tuple(part))

    def _write(self, sql: str, rows: list[tuple]) -> None:
        try:
            with self._db:
                self._db.executemany(sql, rows)
        except sqlite3.Error as exc:
            # Each write is its own transaction: a failed one is rolled back whole and every
            # row before it stays (a full disk gives SQLITE_FULL, "database or disk is full").
            raise StoreError(
                f"cannot write the result store: {exc}; the points stored before are kept "
                "and a re-run resumes from them",
                file=self.path,
            ) from exc


def _why(point: Work, stored: list, current: tuple[tuple[str, str | None], ...]) -> Stale:
    then = {path: digest for path, digest in stored}
    now = dict(current)
    changed = sorted({Path(p).name for p in then.keys() | now.keys() if then.get(p) != now.get(p)})
    return Stale(point, tuple(changed))


def _hash(value: object) -> str:
    return hashlib.sha256(json.dumps(value, sort_keys=True).encode()).hexdigest()


def _hash_with(head: str, point: Work) -> str:
    """``_hash([head, [the point's record name, its fields]])``, with the point's part
    written once per point (``_point_text``): a run hashes each point for its key and slot,
    on lookup and again when its result is stored."""
    text = f"[{json.dumps(head)}, {_point_text(point)}]"  # json.dumps' own list layout
    return hashlib.sha256(text.encode()).hexdigest()


@functools.lru_cache(maxsize=8192)
def _point_text(point: Work) -> str:
    # json writes floats with repr, which round-trips: the key holds the exact slew and load.
    return json.dumps([type(point).__name__, _plain(point)], sort_keys=True)


def _plain(value: object) -> object:
    """A record as JSON-ready lists and dicts."""
    if value is None or isinstance(value, float | int | str):
        return value  # most of a record's values: no dataclass test needed
    if dataclasses.is_dataclass(value):
        return {f.name: _plain(getattr(value, f.name)) for f in dataclasses.fields(value)}
    if isinstance(value, (tuple, list)):
        return [_plain(v) for v in value]
    return value


def _encode(m: Result) -> str:
    fields = {f.name: _plain(getattr(m, f.name)) for f in dataclasses.fields(m)}
    del fields["point"]  # the key already names it
    return json.dumps(fields)


def _decode(record: str, point: Work, text: str) -> Outcome | None:
    """The result a row holds; None when the row does not fit its record as it is now."""
    try:
        cls = RECORDS[record]
        hints = _hints(cls)
        data = json.loads(text)
        return cls(point=point, **{k: _typed(hints[k], v) for k, v in data.items()})
    except (KeyError, TypeError, ValueError):
        return None


def _typed(hint: object, value: Any) -> object:  # value: what JSON gave
    """``value`` read back from JSON as the type ``hint`` names (tuples, records, optionals)."""
    if value is None:
        return None
    origin = typing.get_origin(hint)
    args = typing.get_args(hint)
    if origin in (types.UnionType, typing.Union):
        return _typed(next(a for a in args if a is not type(None)), value)
    if origin is tuple:
        if len(args) == 2 and args[1] is Ellipsis:
            return tuple(_typed(args[0], v) for v in value)
        return tuple(_typed(a, v) for a, v in zip(args, value, strict=True))
    if isinstance(hint, type) and dataclasses.is_dataclass(hint):
        sub = _hints(hint)
        return hint(**{k: _typed(sub[k], v) for k, v in value.items()})
    return value


@functools.cache
def _hints(cls: type) -> dict[str, object]:
    return typing.get_type_hints(cls)
