"""The results store: every session, run, measurement and telemetry recording in one SQLite file.

Why SQLite: one file a team can copy to a laptop or attach to a bug report, transactions that
survive a crash, and no server. Only the standard library's sqlite3 is used.

Durability. The file runs in WAL mode with synchronous=FULL: each commit fsyncs the write-ahead
log, so a run that finish_run() has returned for survives a crash and a power cut. WAL with
synchronous=NORMAL only fsyncs at checkpoints and can lose the last commits on power loss; with a
robot on battery and a laptop on battery that is a real case, and FULL costs one fsync per run,
which is far inside the ingest budget (see bench/store.py). Each run is written in one
transaction: after a crash it is either complete or still 'running', never half there.

One writer at a time. A writable Store holds an OS lock on "<file>.lock" for as long as it is
open; a second writable Store on the same file is refused with a clear error, while read-only
Stores (reports, analysis) open freely beside it. Because the lock guarantees nobody else is
recording, recovery on open can treat every run and session still 'running' (other than those
this Store began) as interrupted. The OS drops the lock when the process dies, even on SIGKILL,
so a crashed runner never leaves a stale lock behind.

Telemetry is stored one row per channel per run, each a BLOB of raw little-endian numpy bytes
with its dtype string, so loading a run is one query and a few np.frombuffer calls.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import secrets
import sqlite3
import sys
from collections.abc import Callable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, NamedTuple

import numpy as np
import pandas as pd

from harness.errors import TrackproofError
from harness.telemetry import CHANNELS, Telemetry, channel_names, empty_telemetry, reflectance_channel

DEFAULT_DB = "trackproof.sqlite"

# Bump when the schema changes, and add a step to _MIGRATIONS that upgrades the previous version.
SCHEMA_VERSION = 1
# PRAGMA application_id "trkp": tells our files apart from any other program's SQLite database.
APPLICATION_ID = 0x74726B70

SESSION_STATUSES = ("running", "finished", "aborted")
RUN_STATUSES = ("running", "pass", "fail", "aborted", "link_lost")
FINAL_RUN_STATUSES = ("pass", "fail", "aborted", "link_lost")
SOURCES = ("robot", "truth")

INTERRUPTED_RUN_NOTE = "interrupted: the runner stopped before this run finished"
INTERRUPTED_SESSION_NOTE = "interrupted: the runner stopped before this session ended"
ENDED_RUN_NOTE = "stopped: the session ended before this run finished"

# Channels stored besides the ones Telemetry.to_dataframe() shows.
_INDEX_CHANNEL = "index"
_BATTERY_CHANNEL = "battery_mv"

_BUSY_TIMEOUT_S = 10.0


class StoreError(TrackproofError):
    """The results file cannot be used as asked; the message names the file and what to do."""

    exit_code = 2


class Recovered(NamedTuple):
    """What recovery found: interrupted sessions (uids) and how many runs it marked 'aborted'."""

    sessions: tuple[str, ...]
    runs: int


_SCHEMA = (
    f"""
    CREATE TABLE sessions (
        id            INTEGER PRIMARY KEY,
        uid           TEXT NOT NULL UNIQUE,
        suite_name    TEXT NOT NULL,
        suite_path    TEXT NOT NULL,
        suite_text    TEXT NOT NULL,
        suite_sha256  TEXT NOT NULL,
        profile_text  TEXT NOT NULL,
        robot_id      TEXT NOT NULL,
        link          TEXT NOT NULL,
        seed          INTEGER,
        tool_version  TEXT NOT NULL,
        started_at    TEXT NOT NULL,
        ended_at      TEXT,
        status        TEXT NOT NULL DEFAULT 'running' CHECK (status IN {SESSION_STATUSES!r}),
        note          TEXT NOT NULL DEFAULT ''
    )
    """,
    # No uniqueness on (case, repetition): a runner may record a retry of a lost repetition.
    f"""
    CREATE TABLE runs (
        id           INTEGER PRIMARY KEY,
        session_id   INTEGER NOT NULL REFERENCES sessions(id) ON DELETE CASCADE,
        case_name    TEXT NOT NULL,
        repetition   INTEGER NOT NULL CHECK (repetition >= 1),
        status       TEXT NOT NULL DEFAULT 'running' CHECK (status IN {RUN_STATUSES!r}),
        params_json  TEXT NOT NULL,
        result_json  TEXT,
        events_json  TEXT,
        started_at   TEXT NOT NULL,
        ended_at     TEXT,
        note         TEXT NOT NULL DEFAULT ''
    )
    """,
    "CREATE INDEX runs_by_session ON runs(session_id)",
    f"""
    CREATE TABLE measurements (
        run_id  INTEGER NOT NULL REFERENCES runs(id) ON DELETE CASCADE,
        name    TEXT NOT NULL,
        value   REAL,
        unit    TEXT NOT NULL,
        source  TEXT NOT NULL CHECK (source IN {SOURCES!r}),
        UNIQUE (run_id, name, source)
    )
    """,
    """
    CREATE TABLE telemetry (
        run_id             INTEGER PRIMARY KEY REFERENCES runs(id) ON DELETE CASCADE,
        n_samples          INTEGER NOT NULL,
        dropped            INTEGER NOT NULL,
        sensor_names_json  TEXT NOT NULL
    )
    """,
    """
    CREATE TABLE telemetry_channels (
        run_id   INTEGER NOT NULL REFERENCES telemetry(run_id) ON DELETE CASCADE,
        channel  TEXT NOT NULL,
        dtype    TEXT NOT NULL,
        data     BLOB NOT NULL,
        PRIMARY KEY (run_id, channel)
    )
    """,
)

# from_version -> step that upgrades a file from that version to the next, inside one transaction.
_MIGRATIONS: dict[int, Callable[[sqlite3.Connection], None]] = {}


# ---------------------------------------------------------------- small helpers


def record_while_failing(step: Callable[[], None]) -> None:
    """Run a store step while an exception is already on its way (a lost link, Ctrl-C): if the
    step fails too, say so on stderr and let the first exception be the one the user sees."""
    try:
        step()
    except Exception as exc:
        print(f"trackproof: also failed to record this in the results store: {exc}", file=sys.stderr)


def _now() -> str:
    """UTC time with offset, millisecond precision: sortable text that needs no time zone guess."""
    return datetime.now(timezone.utc).isoformat(timespec="milliseconds")


def _new_uid() -> str:
    """A short id to type on the command line: local wall-clock time (what the user remembers)
    plus 4 random hex digits, because two sessions can start in the same second."""
    return datetime.now().strftime("%Y%m%d-%H%M%S") + "-" + secrets.token_hex(2)


def _json_default(value: Any) -> Any:
    # Runners often hand over numpy scalars and arrays; store them as plain JSON numbers/lists.
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    raise TypeError(f"{type(value).__name__} is not JSON serialisable")


def _to_json(value: Any, what: str) -> str:
    """JSON text of value; ValueError before anything is written if it cannot be stored.

    NaN and infinities are kept (Python's JSON extension) so results round-trip exactly.
    """
    try:
        return json.dumps(value, default=_json_default, ensure_ascii=False)
    except (TypeError, ValueError) as exc:
        raise ValueError(f"{what} cannot be stored as JSON: {exc}") from None


def _from_json(text: str | None) -> Any:
    return None if text is None else json.loads(text)


def _placeholders(values: Sequence[Any]) -> str:
    return ",".join("?" * len(values))


def _timestamps(column: pd.Series) -> pd.Series:
    return pd.to_datetime(column, utc=True, format="ISO8601")


def _frame(rows: list[tuple], columns: Sequence[str], dtypes: Mapping[str, str]) -> pd.DataFrame:
    """A DataFrame with fixed dtypes, also when there are no rows (so callers can rely on them)."""
    frame = pd.DataFrame.from_records(rows, columns=list(columns))
    return frame.astype(dict(dtypes)) if dtypes else frame


def _measurement_rows(run_id: int, measurements: Sequence[tuple[str, float | None, str, str]]) -> list[tuple]:
    """Checked rows for the measurements table; ValueError on the first bad one."""
    rows = []
    seen: set[tuple[str, str]] = set()
    for k, item in enumerate(measurements):
        try:
            name, value, unit, source = item
        except (TypeError, ValueError):
            raise ValueError(f"measurement {k} must be (name, value, unit, source), got {item!r}") from None
        if not isinstance(name, str) or not name:
            raise ValueError(f"measurement {k}: name must be a non-empty string, got {name!r}")
        if not isinstance(unit, str):
            raise ValueError(f"measurement {name!r}: unit must be a string, got {unit!r}")
        if source not in SOURCES:
            raise ValueError(f"measurement {name!r}: source must be one of {SOURCES}, got {source!r}")
        if (name, source) in seen:
            raise ValueError(f"measurement {name!r} from {source!r} given twice")
        seen.add((name, source))
        if value is not None:
            if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, float, np.integer, np.floating)):
                raise ValueError(f"measurement {name!r}: value must be a number, got {value!r}")
            value = float(value)
            if math.isnan(value):
                value = None  # SQLite stores NaN as NULL anyway; it reads back as NaN
        rows.append((run_id, name, value, unit, source))
    return rows


def _channel_arrays(telemetry: Telemetry) -> dict[str, np.ndarray]:
    """Every array of a recording, one 1-D little-endian contiguous array per stored channel."""
    n = len(telemetry)
    names = tuple(telemetry.sensor_names)
    if len(set(names)) != len(names):
        raise ValueError(f"telemetry sensor names are not unique: {names!r}")
    arrays: dict[str, np.ndarray] = {_INDEX_CHANNEL: telemetry.index, _BATTERY_CHANNEL: telemetry.battery_mv}
    for name in CHANNELS:
        arrays[name] = getattr(telemetry, name)
    refl = np.asarray(telemetry.reflectance_pct)
    if refl.shape != (n, len(names)):
        raise ValueError(f"telemetry reflectance has shape {refl.shape}, expected {(n, len(names))}")
    for k, sensor in enumerate(names):
        arrays[reflectance_channel(sensor)] = refl[:, k]
    out = {}
    for name, array in arrays.items():
        array = np.asarray(array)
        if array.shape != (n,):
            raise ValueError(f"telemetry channel {name} has shape {array.shape}, expected ({n},)")
        if array.dtype.hasobject:
            raise ValueError(f"telemetry channel {name} has dtype {array.dtype}, which has no raw bytes")
        out[name] = np.ascontiguousarray(array, dtype=array.dtype.newbyteorder("<"))
    return out


# ---------------------------------------------------------------- the writer lock


class _WriterLock:
    """An exclusive, non-blocking OS lock on "<db>.lock", held while a writable Store is open.

    A separate file, because opening and closing a second descriptor on the database itself
    would silently drop SQLite's own POSIX locks. The file is left in place on release: deleting
    it would race with another process that has opened it but not locked it yet.
    """

    def __init__(self, db_path: Path) -> None:
        self.path = db_path.with_name(db_path.name + ".lock")
        self._fd: int | None = None

    def acquire(self, db_path: Path) -> None:
        try:
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
        except OSError as exc:
            raise StoreError(f"{db_path}: cannot create the lock file {self.path}: {exc.strerror}") from None
        try:
            _try_lock(fd)
        except OSError:
            owner = _read_owner(fd)
            os.close(fd)
            raise StoreError(
                f"{db_path}: another trackproof process{owner} is recording into this file; wait for it "
                "to finish, open the file read-only, or record into another file"
            ) from None
        self._fd = fd
        # Note who holds the lock, for the message above; best effort only.
        try:
            os.ftruncate(fd, 0)
            os.lseek(fd, 0, os.SEEK_SET)
            os.write(fd, b"%d\n" % os.getpid())
        except OSError:
            pass

    def release(self) -> None:
        if self._fd is not None:
            fd, self._fd = self._fd, None
            try:
                _unlock(fd)
            finally:
                os.close(fd)


if os.name == "nt":  # pragma: no cover - exercised only where os.name is "nt"
    import msvcrt

    def _try_lock(fd: int) -> None:
        os.lseek(fd, 0, os.SEEK_SET)
        msvcrt.locking(fd, msvcrt.LK_NBLCK, 1)

    def _unlock(fd: int) -> None:
        os.lseek(fd, 0, os.SEEK_SET)
        try:
            msvcrt.locking(fd, msvcrt.LK_UNLCK, 1)
        except OSError:
            pass

else:
    import fcntl

    def _try_lock(fd: int) -> None:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)

    def _unlock(fd: int) -> None:
        fcntl.flock(fd, fcntl.LOCK_UN)


def _read_owner(fd: int) -> str:
    try:
        os.lseek(fd, 0, os.SEEK_SET)
        text = os.read(fd, 32).decode("ascii").strip()
    except (OSError, UnicodeError):
        return ""
    return f" (pid {text})" if text.isdigit() else ""


# ---------------------------------------------------------------- the store


class Store:
    """The results file. `Store(path)` opens it for recording (creating it if missing), upgrades an
    older schema, and recovers runs a crashed runner left 'running'. `Store(path, readonly=True)`
    only reads: it never creates, upgrades or recovers, so it is safe beside a live runner.

    Use it as a context manager so the file and its lock are released however the block ends.
    """

    def __init__(self, path: str | os.PathLike[str] = DEFAULT_DB, *, readonly: bool = False) -> None:
        self.path = Path(path)
        self.readonly = readonly
        self.recovered = Recovered((), 0)
        self._conn: sqlite3.Connection | None = None
        self._lock: _WriterLock | None = None
        self._own_sessions: set[int] = set()  # sessions begun by this Store: never "interrupted"
        self._check_path()
        try:
            # Before locking or any pragma that writes: a wrong file gets no lock file beside it
            # and is left exactly as it was.
            try:
                self._conn = self._connect()
                self._check_header()
            except sqlite3.OperationalError as exc:
                if not (readonly and "unable to open" in str(exc) and self._can_read_as_it_stands()):
                    raise
                # A read-only folder (a results file on a read-only mount, or someone else's):
                # SQLite cannot make the WAL's shared-memory file beside it. With no WAL file
                # there, the database file is all there is: read it as it stands.
                if self._conn is not None:
                    self._conn.close()
                self._conn = self._connect(immutable=True)
                self._check_header()
            if not readonly:
                self._lock = _WriterLock(self.path)
                self._lock.acquire(self.path)
                self._conn.execute("PRAGMA journal_mode = WAL").fetchone()
                self._conn.execute("PRAGMA synchronous = FULL")
                self._prepare_schema()
                self.recovered = self.recover()
        except sqlite3.Error as exc:
            self.close()
            raise self._open_error(exc) from None
        except BaseException:
            self.close()
            raise

    # ------------------------------------------------------------ opening

    def _check_path(self) -> None:
        if self.path.is_dir():
            raise StoreError(f"{self.path}: is a directory; give a results file, e.g. {self.path / DEFAULT_DB}")
        if self.readonly and not self.path.exists():
            raise StoreError(f"{self.path}: no results file here (nothing has been recorded into it yet)")
        parent = self.path.parent
        if not parent.is_dir():
            raise StoreError(f"{self.path}: the directory {parent} does not exist")

    def _connect(self, immutable: bool = False) -> sqlite3.Connection:
        # A URI so that no file name (":memory:", names with "?") is taken for anything but a path.
        uri = self.path.resolve().as_uri() + ("?mode=ro" if self.readonly else "?mode=rwc")
        if immutable:
            uri += "&immutable=1"
        # isolation_level=None: this module issues BEGIN/COMMIT itself, so transaction borders are
        # exactly where the code says.
        conn = sqlite3.connect(uri, uri=True, isolation_level=None, timeout=_BUSY_TIMEOUT_S)
        conn.execute("PRAGMA foreign_keys = ON")
        return conn

    def _can_read_as_it_stands(self) -> bool:
        """A folder this process cannot write, and no WAL file holding changes not yet in the
        database file (a writer elsewhere may be live; then only SQLite's own locking is safe)."""
        wal = self.path.with_name(self.path.name + "-wal")
        return not os.access(self.path.parent, os.W_OK) and not (wal.exists() and wal.stat().st_size > 0)

    def _open_error(self, exc: sqlite3.Error) -> StoreError:
        text = str(exc)
        if "not a database" in text:
            return StoreError(f"{self.path}: not a trackproof results file (not an SQLite database)")
        if "unable to open" in text:
            return StoreError(f"{self.path}: cannot open ({text}); check the path and its permissions")
        return StoreError(f"{self.path}: cannot open the results file: {text}")

    def _header(self) -> tuple[int, int, int]:
        conn = self._connection()
        app_id = conn.execute("PRAGMA application_id").fetchone()[0]
        version = conn.execute("PRAGMA user_version").fetchone()[0]
        n_objects = conn.execute("SELECT count(*) FROM sqlite_master").fetchone()[0]
        return app_id, version, n_objects

    def _check_header(self) -> bool:
        """True if the file is new and empty; StoreError unless it is a store we can use."""
        app_id, version, n_objects = self._header()
        if app_id == 0 and version == 0 and n_objects == 0:
            if self.readonly:
                raise StoreError(f"{self.path}: empty, nothing has been recorded into it yet")
            return True
        if app_id != APPLICATION_ID:
            raise StoreError(
                f"{self.path}: an SQLite database, but not a trackproof results file; choose another file"
            )
        if version > SCHEMA_VERSION:
            raise StoreError(
                f"{self.path}: written by a newer trackproof (store schema version {version}); this "
                f"trackproof reads version {SCHEMA_VERSION}. Upgrade trackproof to open it."
            )
        if version < SCHEMA_VERSION:
            missing = [v for v in range(version, SCHEMA_VERSION) if v not in _MIGRATIONS]
            if missing:
                raise StoreError(
                    f"{self.path}: store schema version {version} is older than version "
                    f"{SCHEMA_VERSION}, and this trackproof cannot upgrade it; open it with the "
                    "trackproof that wrote it and export what you need"
                )
            if self.readonly:
                raise StoreError(
                    f"{self.path}: store schema version {version} is older than version "
                    f"{SCHEMA_VERSION}; open it once for recording (not read-only) to upgrade it"
                )
        return False

    def _prepare_schema(self) -> None:
        """Create a new file's schema, or upgrade an older one, in one transaction."""
        with self._transaction("prepare the schema") as conn:
            if self._check_header():  # again: under the write lock, so nothing can change under us
                for statement in _SCHEMA:
                    conn.execute(statement)
                conn.execute(f"PRAGMA application_id = {APPLICATION_ID:d}")
                conn.execute(f"PRAGMA user_version = {SCHEMA_VERSION:d}")
                return
            version = self._header()[1]
            for step in range(version, SCHEMA_VERSION):
                _MIGRATIONS[step](conn)
                conn.execute(f"PRAGMA user_version = {step + 1:d}")

    # ------------------------------------------------------------ life cycle

    def close(self) -> None:
        """Close the file and release the writer lock. Safe to call twice."""
        if self._conn is not None:
            conn, self._conn = self._conn, None
            conn.close()
        if self._lock is not None:
            lock, self._lock = self._lock, None
            lock.release()

    def __enter__(self) -> Store:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    def _connection(self) -> sqlite3.Connection:
        if self._conn is None:
            raise StoreError(f"{self.path}: the results file is closed")
        return self._conn

    def _error(self, action: str, exc: sqlite3.Error) -> StoreError:
        return StoreError(f"{self.path}: could not {action}: {exc}")

    @contextmanager
    def _transaction(self, action: str) -> Iterator[sqlite3.Connection]:
        """One write transaction: everything in the block is committed together or not at all.

        BEGIN IMMEDIATE takes the write lock up front, so a transaction never fails half way for
        want of it.
        """
        if self.readonly:
            raise StoreError(f"{self.path}: opened read-only; cannot {action}")
        conn = self._connection()
        try:
            conn.execute("BEGIN IMMEDIATE")
        except sqlite3.Error as exc:
            raise self._error(action, exc) from None
        try:
            yield conn
            conn.execute("COMMIT")
        except BaseException as exc:
            if conn.in_transaction:
                try:
                    conn.execute("ROLLBACK")
                except sqlite3.Error:
                    pass  # the connection rolls back by itself when it is closed
            if isinstance(exc, sqlite3.Error):
                raise self._error(action, exc) from None
            raise

    @contextmanager
    def _reading(self, action: str) -> Iterator[sqlite3.Connection]:
        conn = self._connection()
        try:
            yield conn
        except sqlite3.Error as exc:
            raise self._error(action, exc) from None

    def recover(self) -> Recovered:
        """Mark runs and sessions left 'running' by a runner that stopped as 'aborted'.

        Called on open. Only one writable Store can have the file open (the writer lock), so
        anything 'running' that this Store did not begin belongs to a process that is gone.
        Finished runs are untouched: they were committed whole.
        """
        own = sorted(self._own_sessions)
        with self._transaction("recover interrupted runs") as conn:
            stale = [
                uid
                for (uid,) in conn.execute(
                    f"SELECT uid FROM sessions WHERE status = 'running' AND id NOT IN ({_placeholders(own)}) "
                    "ORDER BY id",
                    own,
                )
            ]
            runs = conn.execute(
                f"UPDATE runs SET status = 'aborted', note = ? "
                f"WHERE status = 'running' AND session_id NOT IN ({_placeholders(own)})",
                [INTERRUPTED_RUN_NOTE, *own],
            ).rowcount
            conn.execute(
                f"UPDATE sessions SET status = 'aborted', note = ? "
                f"WHERE status = 'running' AND id NOT IN ({_placeholders(own)})",
                [INTERRUPTED_SESSION_NOTE, *own],
            )
        return Recovered(tuple(stale), runs)

    # ------------------------------------------------------------ recording

    def begin_session(
        self,
        *,
        suite_name: str,
        suite_path: str | os.PathLike[str],
        suite_text: str,
        profile_text: str,
        robot_id: str,
        link: str,
        seed: int | None,
        tool_version: str,
    ) -> str:
        """Record a new session with everything needed to reproduce it; returns its uid.

        The suite's text is stored whole (and its sha256, to spot edited suites between
        sessions), because the file on disk may change after the session.
        """
        sha256 = hashlib.sha256(suite_text.encode("utf-8")).hexdigest()
        with self._transaction("begin a session") as conn:
            uid = _new_uid()
            while conn.execute("SELECT 1 FROM sessions WHERE uid = ?", (uid,)).fetchone():
                uid = _new_uid()
            cursor = conn.execute(
                "INSERT INTO sessions (uid, suite_name, suite_path, suite_text, suite_sha256, profile_text, "
                "robot_id, link, seed, tool_version, started_at) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (uid, suite_name, os.fspath(suite_path), suite_text, sha256, profile_text, robot_id, link,
                 seed, tool_version, _now()),
            )
            session_id = int(cursor.lastrowid)
        self._own_sessions.add(session_id)
        return uid

    def begin_run(self, session_uid: str, case_name: str, repetition: int, params: dict[str, Any]) -> int:
        """Record that a run starts, and commit at once, so a run the runner never finishes shows
        up as interrupted instead of vanishing. Returns the run id for finish_run."""
        if isinstance(repetition, bool) or not isinstance(repetition, (int, np.integer)) or repetition < 1:
            raise ValueError(f"repetition counts from 1, got {repetition!r}")
        params_json = _to_json(params, "params")
        with self._transaction("begin a run") as conn:
            session_id = self._running_session(conn, session_uid)
            cursor = conn.execute(
                "INSERT INTO runs (session_id, case_name, repetition, params_json, started_at) "
                "VALUES (?, ?, ?, ?, ?)",
                (session_id, case_name, int(repetition), params_json, _now()),
            )
            return int(cursor.lastrowid)

    def finish_run(
        self,
        run_id: int,
        status: str,
        result: dict[str, Any],
        events: list[Any],
        measurements: Sequence[tuple[str, float | None, str, str]],
        telemetry: Telemetry | None,
        note: str = "",
    ) -> None:
        """Write a run's outcome, measurements and telemetry in one transaction and commit.

        Everything is checked and encoded before the transaction starts, so a bad argument
        raises ValueError with nothing written; a crash during the write leaves the run
        'running' (recovered as 'aborted'), never half recorded. A finished run is never
        overwritten.
        """
        if status not in FINAL_RUN_STATUSES:
            raise ValueError(f"a finished run's status is one of {FINAL_RUN_STATUSES}, got {status!r}")
        result_json = _to_json(result, "result")
        events_json = _to_json(events, "events")
        rows = _measurement_rows(run_id, measurements)
        channels = _channel_arrays(telemetry) if telemetry is not None else {}
        with self._transaction(f"record run {run_id}") as conn:
            found = conn.execute("SELECT status FROM runs WHERE id = ?", (run_id,)).fetchone()
            if found is None:
                raise StoreError(f"{self.path}: no run {run_id}")
            if found[0] != "running":
                raise StoreError(f"{self.path}: run {run_id} is already recorded as {found[0]!r}")
            conn.execute(
                "UPDATE runs SET status = ?, result_json = ?, events_json = ?, ended_at = ?, note = ? "
                "WHERE id = ?",
                (status, result_json, events_json, _now(), note, run_id),
            )
            conn.executemany(
                "INSERT INTO measurements (run_id, name, value, unit, source) VALUES (?, ?, ?, ?, ?)", rows
            )
            if telemetry is not None:
                conn.execute(
                    "INSERT INTO telemetry (run_id, n_samples, dropped, sensor_names_json) VALUES (?, ?, ?, ?)",
                    (run_id, len(telemetry), int(telemetry.dropped), json.dumps(list(telemetry.sensor_names))),
                )
                conn.executemany(
                    "INSERT INTO telemetry_channels (run_id, channel, dtype, data) VALUES (?, ?, ?, ?)",
                    [(run_id, name, array.dtype.str, memoryview(array).cast("B"))
                     for name, array in channels.items()],
                )

    def end_session(self, uid: str, status: str) -> None:
        """Close a session as 'finished' or 'aborted'. Runs still 'running' in it become 'aborted',
        since nothing will finish them."""
        if status not in ("finished", "aborted"):
            raise ValueError(f"a session ends 'finished' or 'aborted', got {status!r}")
        with self._transaction(f"end session {uid}") as conn:
            session_id = self._running_session(conn, uid)
            conn.execute(
                "UPDATE runs SET status = 'aborted', note = ? WHERE session_id = ? AND status = 'running'",
                (ENDED_RUN_NOTE, session_id),
            )
            conn.execute(
                "UPDATE sessions SET status = ?, ended_at = ? WHERE id = ?", (status, _now(), session_id)
            )
        self._own_sessions.discard(session_id)

    def reopen_session(self, uid: str) -> None:
        """Make an ended session 'running' again so a resumed runner can add the runs it lacks.

        Its earlier runs stay as they were; a repetition recorded again is a new run beside the
        old one, so nothing that happened is ever rewritten.
        """
        with self._transaction(f"reopen session {uid}") as conn:
            session_id, status = self._session_id(conn, uid)
            if status == "running":
                raise StoreError(f"{self.path}: session {uid} is already running")
            conn.execute("UPDATE sessions SET status = 'running', ended_at = NULL, note = '' WHERE id = ?",
                         (session_id,))
        self._own_sessions.add(session_id)

    def _session_id(self, conn: sqlite3.Connection, uid: str) -> tuple[int, str]:
        row = conn.execute("SELECT id, status FROM sessions WHERE uid = ?", (uid,)).fetchone()
        if row is None:
            raise StoreError(f"{self.path}: no session {uid!r}")
        return int(row[0]), row[1]

    def _running_session(self, conn: sqlite3.Connection, uid: str) -> int:
        session_id, status = self._session_id(conn, uid)
        if status != "running":
            raise StoreError(f"{self.path}: session {uid} has ended ({status}); begin a new session")
        return session_id

    # ------------------------------------------------------------ reading

    def resolve_session(self, text: str) -> str:
        """The uid meant by text: a uid, a prefix matching exactly one uid, or "latest"."""
        text = text.strip()
        with self._reading("look up a session") as conn:
            if not text:
                raise StoreError(f"{self.path}: empty session id; give a session id, a unique prefix, or 'latest'")
            newest = conn.execute("SELECT uid FROM sessions ORDER BY id DESC LIMIT 1").fetchone()
            if newest is None:
                raise StoreError(f"{self.path}: no sessions recorded yet")
            if text == "latest":
                return newest[0]
            if conn.execute("SELECT 1 FROM sessions WHERE uid = ?", (text,)).fetchone():
                return text
            matches = [
                uid
                for (uid,) in conn.execute(
                    "SELECT uid FROM sessions WHERE substr(uid, 1, ?) = ? ORDER BY id DESC LIMIT 6",
                    (len(text), text),
                )
            ]
        if len(matches) == 1:
            return matches[0]
        if not matches:
            raise StoreError(f"{self.path}: no session matches {text!r} (the newest is {newest[0]})")
        shown = ", ".join(matches[:5]) + (", ..." if len(matches) > 5 else "")
        raise StoreError(f"{self.path}: {text!r} matches several sessions ({shown}); give more of the id")

    def session(self, uid: str) -> dict[str, Any]:
        """The session's row, suite and profile text included."""
        with self._reading(f"read session {uid}") as conn:
            cursor = conn.execute("SELECT * FROM sessions WHERE uid = ?", (uid,))
            row = cursor.fetchone()
            if row is None:
                raise StoreError(f"{self.path}: no session {uid!r}")
            return dict(zip([d[0] for d in cursor.description], row))

    def sessions(self) -> pd.DataFrame:
        """One row per session, newest first (by recording order, so clock changes cannot reorder
        them), with the number of runs in each status. Suite and profile text are left out; see
        session()."""
        counts = ", ".join(
            f"coalesce(sum(r.status = '{status}'), 0) AS n_{status}" for status in RUN_STATUSES
        )
        columns = ["uid", "status", "suite_name", "suite_path", "suite_sha256", "robot_id", "link", "seed",
                   "tool_version", "started_at", "ended_at", "note"]
        with self._reading("list sessions") as conn:
            rows = conn.execute(
                f"SELECT {', '.join('s.' + c for c in columns)}, count(r.id) AS n_runs, {counts} "
                "FROM sessions s LEFT JOIN runs r ON r.session_id = s.id GROUP BY s.id ORDER BY s.id DESC"
            ).fetchall()
        names = columns + ["n_runs"] + [f"n_{status}" for status in RUN_STATUSES]
        dtypes = {"seed": "Int64", **{name: "int64" for name in names[len(columns):]}}
        frame = _frame(rows, names, dtypes)
        for name in ("started_at", "ended_at"):
            frame[name] = _timestamps(frame[name])
        return frame

    def runs(self, uid: str) -> pd.DataFrame:
        """A session's runs in the order they were recorded; params, result and events decoded
        from JSON; samples and dropped are <NA> for runs without telemetry."""
        with self._reading(f"read the runs of session {uid}") as conn:
            session_id, _ = self._session_id(conn, uid)
            rows = conn.execute(
                "SELECT r.id, r.case_name, r.repetition, r.status, r.params_json, r.result_json, r.events_json, "
                "r.started_at, r.ended_at, r.note, t.n_samples, t.dropped "
                "FROM runs r LEFT JOIN telemetry t ON t.run_id = r.id WHERE r.session_id = ? ORDER BY r.id",
                (session_id,),
            ).fetchall()
        rows = [(*row[:4], _from_json(row[4]), _from_json(row[5]), _from_json(row[6]), *row[7:]) for row in rows]
        names = ["run_id", "case_name", "repetition", "status", "params", "result", "events", "started_at",
                 "ended_at", "note", "samples", "dropped"]
        frame = _frame(rows, names, {"run_id": "int64", "repetition": "int64", "samples": "Int64",
                                     "dropped": "Int64"})
        for name in ("started_at", "ended_at"):
            frame[name] = _timestamps(frame[name])
        return frame

    def measurements(self, uid: str) -> pd.DataFrame:
        """All measurements of a session, long format, with the case, repetition and status of
        the run each belongs to; in recording order."""
        with self._reading(f"read the measurements of session {uid}") as conn:
            session_id, _ = self._session_id(conn, uid)
            rows = conn.execute(
                "SELECT m.run_id, r.case_name, r.repetition, r.status, m.name, m.value, m.unit, m.source "
                "FROM measurements m JOIN runs r ON r.id = m.run_id WHERE r.session_id = ? "
                "ORDER BY m.run_id, m.rowid",
                (session_id,),
            ).fetchall()
        names = ["run_id", "case_name", "repetition", "run_status", "name", "value", "unit", "source"]
        return _frame(rows, names, {"run_id": "int64", "repetition": "int64", "value": "float64"})

    def _telemetry_arrays(self, run_id: int) -> tuple[int, tuple[str, ...], dict[str, np.ndarray]] | None:
        """(dropped, sensor names, arrays by channel) of a run, or None if it has no telemetry."""
        with self._reading(f"read the telemetry of run {run_id}") as conn:
            rows = conn.execute(
                "SELECT t.n_samples, t.dropped, t.sensor_names_json, c.channel, c.dtype, c.data "
                "FROM telemetry t LEFT JOIN telemetry_channels c ON c.run_id = t.run_id WHERE t.run_id = ?",
                (run_id,),
            ).fetchall()
            if not rows:
                if conn.execute("SELECT 1 FROM runs WHERE id = ?", (run_id,)).fetchone() is None:
                    raise StoreError(f"{self.path}: no run {run_id}")
                return None
        n_samples, dropped, sensors_json = rows[0][:3]
        sensors = tuple(json.loads(sensors_json))
        arrays: dict[str, np.ndarray] = {}
        try:
            for *_, channel, dtype, data in rows:
                if channel is not None:
                    arrays[channel] = np.frombuffer(data, dtype=np.dtype(dtype))
        except (TypeError, ValueError) as exc:
            raise StoreError(f"{self.path}: the telemetry of run {run_id} is damaged: {exc}") from None
        expected = {_INDEX_CHANNEL, _BATTERY_CHANNEL, *channel_names(sensors)}
        wrong = sorted(name for name in expected if name not in arrays or arrays[name].shape != (n_samples,))
        if wrong:
            raise StoreError(
                f"{self.path}: the telemetry of run {run_id} is damaged (channels {', '.join(wrong)})"
            )
        return int(dropped), sensors, arrays

    def telemetry(self, run_id: int) -> pd.DataFrame:
        """A run's telemetry as Telemetry.to_dataframe() gives it: same columns, dtypes and index.
        Empty (fixed channels only) if the run recorded none."""
        found = self._telemetry_arrays(run_id)
        if found is None:
            return empty_telemetry(()).to_dataframe()
        _, sensors, arrays = found
        columns = {name: arrays[name] for name in channel_names(sensors)}
        return pd.DataFrame(columns, index=pd.Index(arrays[_INDEX_CHANNEL], name="index"))

    def load_telemetry(self, run_id: int) -> Telemetry | None:
        """A run's telemetry as the Telemetry object that was recorded, battery and dropped count
        included; None if the run recorded none."""
        found = self._telemetry_arrays(run_id)
        if found is None:
            return None
        dropped, sensors, arrays = found
        n = arrays[_INDEX_CHANNEL].shape[0]
        if sensors:
            reflectance = np.column_stack([arrays[reflectance_channel(s)] for s in sensors])
        else:
            reflectance = np.zeros((n, 0), dtype=np.uint8)
        reflectance.setflags(write=False)  # like the arrays from frombuffer: a recording is read-only
        return Telemetry(
            index=arrays[_INDEX_CHANNEL],
            **{name: arrays[name] for name in CHANNELS},
            reflectance_pct=reflectance,
            sensor_names=sensors,
            battery_mv=arrays[_BATTERY_CHANNEL],
            dropped=dropped,
        )
