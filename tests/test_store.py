"""The results store (harness.store): round trips, recovery after a crash, and refusing bad files."""

from __future__ import annotations

import hashlib
import os
import signal
import sqlite3
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from harness import store as store_module
from harness.errors import TrackproofError
from harness.store import (
    DEFAULT_DB,
    INTERRUPTED_RUN_NOTE,
    SCHEMA_VERSION,
    Store,
    StoreError,
)
from harness.telemetry import Telemetry, decode_batches
from hub_side import wire

REPO = Path(__file__).resolve().parents[1]
SENSORS = ("left", "centre", "right")
SUITE_TEXT = '[suite]\nname = "junctions"\n'


def make_telemetry(n: int, sensors: tuple[str, ...] = SENSORS, skip: tuple[int, ...] = (),
                   seed: int = 0) -> Telemetry:
    """n samples through the hub's own batch builder and the host decoder; batches listed in
    skip are left out, so the recording has gaps and a dropped count."""
    rng = np.random.default_rng(seed)
    bodies = []
    for b, first in enumerate(range(0, n, wire.MAX_BATCH_SAMPLES)):
        batch = wire.TelemetryBatch(len(sensors))
        batch.reset(first)
        for i in range(first, min(first + wire.MAX_BATCH_SAMPLES, n)):
            batch.add(5_000 * i, int(rng.integers(-5000, 5000)), int(rng.integers(-5000, 5000)),
                      float(rng.uniform(-720, 720)), float(rng.uniform(-100, 100)), int(rng.integers(-100, 100)),
                      int(rng.integers(-100, 100)), [int(v) for v in rng.integers(0, 101, len(sensors))])
        if b not in skip:
            bodies.append(batch.body(7400 - b))
    return decode_batches(bodies, sensors)


def new_session(store: Store, suite_name: str = "junctions", seed: int | None = 7) -> str:
    return store.begin_session(suite_name=suite_name, suite_path="suites/junctions.toml", suite_text=SUITE_TEXT,
                               profile_text='id = "bot"\n', robot_id="bot", link="sim", seed=seed,
                               tool_version="0.1.0")


def record_run(store: Store, uid: str, case: str, rep: int, status: str = "pass",
               telemetry: Telemetry | None = None, overrun_mm: float = 80.0) -> int:
    run_id = store.begin_run(uid, case, rep, {"overrun_mm": 80, "speed_pct": 40})
    store.finish_run(run_id, status, {"overrun_measured_mm": overrun_mm}, [{"kind": "junction", "t_s": 1.5}],
                     [("overrun_mm", overrun_mm, "mm", "robot"), ("overrun_mm", overrun_mm + 0.5, "mm", "truth")],
                     telemetry)
    return run_id


@pytest.fixture
def db(tmp_path: Path) -> Path:
    return tmp_path / DEFAULT_DB


# ---------------------------------------------------------------- round trips


def test_a_results_file_in_a_read_only_folder_can_be_read(db: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # Where SQLite cannot make the WAL's shared-memory file (a read-only folder) it cannot open
    # the file for reading; as root (CI) no folder is read-only, so that failure and the folder's
    # permission are stood in for, and the fallback is what is tested.
    with Store(db) as store:
        uid = new_session(store)
        store.end_session(uid, "finished")
    real_access, real_connect = os.access, Store._connect
    monkeypatch.setattr(os, "access", lambda path, mode: False if Path(path) == db.parent else real_access(path, mode))

    def cannot_make_shm(self: Store, immutable: bool = False) -> sqlite3.Connection:
        if not immutable:
            raise sqlite3.OperationalError("unable to open database file")
        return real_connect(self, immutable)

    monkeypatch.setattr(Store, "_connect", cannot_make_shm)
    with Store(db, readonly=True) as store:
        assert store.session(uid)["status"] == "finished" and len(store.sessions()) == 1
    # With a WAL file beside it a writer may be live, and the file alone is not the whole story:
    # refused with the reason rather than read wrong.
    db.with_name(db.name + "-wal").write_bytes(b"\x00" * 32)
    with pytest.raises(TrackproofError, match="cannot open"):
        Store(db, readonly=True)


def test_session_run_measurement_round_trip(db: Path) -> None:
    with Store(db) as store:
        uid = new_session(store)
        run_id = store.begin_run(uid, "third junction", 1, {"overrun_mm": 80, "gain": np.float64(0.5)})
        store.finish_run(run_id, "fail", {"overrun_measured_mm": 82.5, "samples": np.int64(3)},
                         [{"kind": "junction", "sides": "left+right"}],
                         [("overrun_mm", 82.5, "mm", "robot"), ("overrun_mm", 81.9, "mm", "truth"),
                          ("angle_error_deg", float("nan"), "deg", "robot")], None, note="slipped")
        store.end_session(uid, "finished")

    with Store(db, readonly=True) as store:
        row = store.session(uid)
        assert row["uid"] == uid and row["status"] == "finished" and row["seed"] == 7
        assert row["suite_text"] == SUITE_TEXT and row["profile_text"] == 'id = "bot"\n'
        assert row["suite_sha256"] == hashlib.sha256(SUITE_TEXT.encode()).hexdigest()
        assert row["started_at"] <= row["ended_at"]

        runs = store.runs(uid)
        assert runs["samples"].dtype == "Int64" and runs[["samples", "dropped"]].isna().all(axis=None)
        first = runs.drop(columns=["samples", "dropped"]).to_dict("records")[0]
        assert first | {"started_at": None, "ended_at": None} == {
            "run_id": run_id, "case_name": "third junction", "repetition": 1, "status": "fail",
            "params": {"overrun_mm": 80, "gain": 0.5}, "result": {"overrun_measured_mm": 82.5, "samples": 3},
            "events": [{"kind": "junction", "sides": "left+right"}], "started_at": None, "ended_at": None,
            "note": "slipped",
        }
        assert runs["ended_at"][0] >= runs["started_at"][0]

        m = store.measurements(uid)
        assert list(m.columns) == ["run_id", "case_name", "repetition", "run_status", "name", "value", "unit",
                                   "source"]
        assert m[["name", "unit", "source"]].values.tolist() == [
            ["overrun_mm", "mm", "robot"], ["overrun_mm", "mm", "truth"], ["angle_error_deg", "deg", "robot"]]
        assert m["value"].tolist()[:2] == [82.5, 81.9] and np.isnan(m["value"][2])
        assert set(m["run_status"]) == {"fail"} and set(m["case_name"]) == {"third junction"}


@pytest.mark.parametrize(
    "telemetry",
    [make_telemetry(200), make_telemetry(300, skip=(2, 5)), make_telemetry(70, sensors=()),
     make_telemetry(0), make_telemetry(40, sensors=("s1", "s2", "s3", "s4", "s5", "s6", "s7", "s8"))],
    ids=["plain", "gaps", "no-sensors", "empty", "eight-sensors"],
)
def test_telemetry_round_trip_is_exact(db: Path, telemetry: Telemetry) -> None:
    with Store(db) as store:
        run_id = record_run(store, new_session(store), "follow", 1, telemetry=telemetry)
    with Store(db, readonly=True) as store:
        frame = store.telemetry(run_id)
        pd.testing.assert_frame_equal(frame, telemetry.to_dataframe(), check_exact=True)
        assert list(frame.columns) == list(telemetry.channels)
        back = store.load_telemetry(run_id)
        assert back is not None and back.sensor_names == telemetry.sensor_names
        assert back.dropped == telemetry.dropped
        np.testing.assert_array_equal(back.battery_mv, telemetry.battery_mv)
        np.testing.assert_array_equal(back.reflectance_pct, telemetry.reflectance_pct)
        assert back.reflectance_pct.dtype == telemetry.reflectance_pct.dtype
        assert store.runs(store.resolve_session("latest"))["samples"].tolist() == [len(telemetry)]


def test_gaps_survive_storage(db: Path) -> None:
    telemetry = make_telemetry(300, skip=(2,))
    assert telemetry.dropped == wire.MAX_BATCH_SAMPLES and len(telemetry) == 300 - wire.MAX_BATCH_SAMPLES
    with Store(db) as store:
        run_id = record_run(store, new_session(store), "follow", 1, telemetry=telemetry)
        index = store.telemetry(run_id).index.to_numpy()
    assert index[64] == 96  # the third batch (64..95) is missing from the index, as recorded


def test_run_without_telemetry_loads_empty_and_unknown_run_is_an_error(db: Path) -> None:
    with Store(db) as store:
        run_id = record_run(store, new_session(store), "turn", 1)
        frame = store.telemetry(run_id)
        assert frame.empty and list(frame.columns)[:3] == ["t_s", "enc_left_deg", "enc_right_deg"]
        assert store.load_telemetry(run_id) is None
        with pytest.raises(StoreError, match="no run 999"):
            store.telemetry(999)


def test_sessions_newest_first_with_counts(db: Path) -> None:
    with Store(db) as store:
        first = new_session(store, "a")
        record_run(store, first, "c", 1, "pass")
        record_run(store, first, "c", 2, "fail")
        record_run(store, first, "c", 3, "pass")
        store.end_session(first, "finished")
        second = new_session(store, "b", seed=None)
        record_run(store, second, "c", 1, "link_lost")
        store.end_session(second, "aborted")
        third = new_session(store, "c")
        listing = store.sessions()
    assert listing["uid"].tolist() == [third, second, first]
    assert listing["suite_name"].tolist() == ["c", "b", "a"]
    assert listing[["n_runs", "n_pass", "n_fail", "n_link_lost", "n_aborted"]].values.tolist() == [
        [0, 0, 0, 0, 0], [1, 0, 0, 1, 0], [3, 2, 1, 0, 0]]
    assert listing["status"].tolist() == ["running", "aborted", "finished"]
    assert listing["seed"].isna().tolist() == [False, True, False]
    assert "suite_text" not in listing.columns


def test_resolve_session(db: Path) -> None:
    with Store(db) as store:
        with pytest.raises(StoreError, match="no sessions recorded yet"):
            store.resolve_session("latest")
        uids = [new_session(store) for _ in range(3)]
        assert store.resolve_session("latest") == uids[-1]
        assert store.resolve_session(f" {uids[0]} ") == uids[0]
        # The shortest prefix of uids[1] that no other uid shares.
        prefix = next(uids[1][:k] for k in range(1, len(uids[1]) + 1)
                      if sum(u.startswith(uids[1][:k]) for u in uids) == 1)
        assert store.resolve_session(prefix) == uids[1]
        with pytest.raises(StoreError, match="matches several sessions"):
            store.resolve_session(uids[0][:8])  # all three share the date
        with pytest.raises(StoreError, match=r"no session matches 'nope' \(the newest is " + uids[-1]):
            store.resolve_session("nope")
        with pytest.raises(StoreError, match="empty session id"):
            store.resolve_session("  ")
    assert uids[0][:8].isdigit() and len(uids[0].split("-")[-1]) == 4


# ---------------------------------------------------------------- recording rules


def test_finish_run_is_one_transaction(db: Path) -> None:
    """A failure while the telemetry is written leaves the run 'running' with nothing else of it."""
    with Store(db) as store:
        uid = new_session(store)
        run_id = store.begin_run(uid, "follow", 1, {})
        store._conn.execute("CREATE TRIGGER fail_telemetry BEFORE INSERT ON telemetry_channels "
                            "BEGIN SELECT RAISE(ABORT, 'simulated write failure'); END")
        with pytest.raises(StoreError, match=f"{db}.*could not record run {run_id}.*simulated write failure"):
            store.finish_run(run_id, "pass", {}, [], [("overrun_mm", 1.0, "mm", "robot")], make_telemetry(40))
        runs = store.runs(uid)
        assert runs["status"].tolist() == ["running"] and runs["result"].tolist() == [None]
        assert store.measurements(uid).empty
        store._conn.execute("DROP TRIGGER fail_telemetry")
        store.finish_run(run_id, "pass", {}, [], [("overrun_mm", 1.0, "mm", "robot")], make_telemetry(40))
        assert store.runs(uid)["status"].tolist() == ["pass"]
        with pytest.raises(StoreError, match="already recorded as 'pass'"):
            store.finish_run(run_id, "fail", {}, [], [], None)


@pytest.mark.parametrize(
    "status, measurements, match",
    [("running", [], "finished run's status"),
     ("pass", [("x", 1.0, "mm", "camera")], "source must be one of"),
     ("pass", [("x", 1.0, "mm", "robot"), ("x", 2.0, "mm", "robot")], "given twice"),
     ("pass", [("x", "1.0", "mm", "robot")], "value must be a number"),
     ("pass", [("x", 1.0, "mm")], r"must be \(name, value, unit, source\)")],
)
def test_bad_finish_arguments_write_nothing(db: Path, status: str, measurements: list, match: str) -> None:
    with Store(db) as store:
        uid = new_session(store)
        run_id = store.begin_run(uid, "follow", 1, {})
        with pytest.raises(ValueError, match=match):
            store.finish_run(run_id, status, {}, [], measurements, None)
        assert store.runs(uid)["status"].tolist() == ["running"]


def test_end_session_aborts_unfinished_runs_and_closes_the_session(db: Path) -> None:
    with Store(db) as store:
        uid = new_session(store)
        record_run(store, uid, "c", 1)
        store.begin_run(uid, "c", 2, {})
        store.end_session(uid, "aborted")
        assert store.runs(uid)["status"].tolist() == ["pass", "aborted"]
        with pytest.raises(StoreError, match=f"session {uid} has ended"):
            store.begin_run(uid, "c", 3, {})
        with pytest.raises(ValueError, match="repetition counts from 1"):
            store.begin_run(new_session(store), "c", 0, {})


def test_durability_settings(db: Path) -> None:
    with Store(db) as store:
        assert store._conn.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
        assert store._conn.execute("PRAGMA synchronous").fetchone()[0] == 2  # FULL
        assert store._conn.execute("PRAGMA foreign_keys").fetchone()[0] == 1
        with pytest.raises(sqlite3.IntegrityError):
            store._conn.execute("INSERT INTO runs (session_id, case_name, repetition, params_json, started_at) "
                                "VALUES (12345, 'c', 1, '{}', 'now')")


# ---------------------------------------------------------------- recovery and the writer lock


def test_reopen_recovers_an_interrupted_run(db: Path) -> None:
    store = Store(db)
    uid = new_session(store)
    record_run(store, uid, "c", 1)
    store.begin_run(uid, "c", 2, {})
    assert store.recovered == ((), 0)
    store.close()  # the runner stops without finishing run 2 or the session

    with Store(db) as store:
        assert store.recovered == ((uid,), 1)
        runs = store.runs(uid)
        assert runs["status"].tolist() == ["pass", "aborted"]
        assert runs["note"].tolist() == ["", INTERRUPTED_RUN_NOTE]
        assert store.session(uid)["status"] == "aborted"
        assert len(store.measurements(uid)) == 2  # the finished run is untouched
    with Store(db) as store:
        assert store.recovered == ((), 0)


def test_reopen_session_resumes_without_rewriting_runs(db: Path) -> None:
    with Store(db) as store:
        uid = new_session(store)
        record_run(store, uid, "c", 1)
        store.begin_run(uid, "c", 2, {})
    with Store(db) as store:  # recovered as aborted; now resumed
        store.reopen_session(uid)
        assert store.session(uid)["status"] == "running" and store.session(uid)["ended_at"] is None
        with pytest.raises(StoreError, match="already running"):
            store.reopen_session(uid)
        record_run(store, uid, "c", 2)
        store.end_session(uid, "finished")
        runs = store.runs(uid)
        assert runs[["repetition", "status"]].values.tolist() == [[1, "pass"], [2, "aborted"], [2, "pass"]]
        assert store.session(uid)["status"] == "finished"


def test_one_writer_at_a_time_readers_beside_it(db: Path) -> None:
    with Store(db) as writer:
        uid = new_session(writer)
        writer.begin_run(uid, "c", 1, {})
        with pytest.raises(StoreError, match=f"{db}: another trackproof process \\(pid {os.getpid()}\\)"):
            Store(db)
        with Store(db, readonly=True) as reader:  # no recovery: the session is live
            assert reader.session(uid)["status"] == "running"
            assert reader.runs(uid)["status"].tolist() == ["running"]
            with pytest.raises(StoreError, match="opened read-only"):
                new_session(reader)
        assert writer.session(uid)["status"] == "running"
    with Store(db) as again:  # the lock went with the writer
        assert again.session(uid)["status"] == "aborted"


CHILD = textwrap.dedent(
    """
    import sys, time
    sys.path.insert(0, sys.argv[1])
    from harness.store import Store
    from harness.telemetry import decode_batches
    from hub_side import wire

    batch = wire.TelemetryBatch(2)
    bodies = []
    for i in range(600):
        if batch.full():
            bodies.append(batch.body(7400))
            batch.reset(i)
        batch.add(5000 * i, i, -i, i / 10, (i % 50) - 25, 30, -30, (i % 101, 100 - i % 101))
    bodies.append(batch.body(7400))
    telemetry = decode_batches(bodies, ("left", "right"))
    store = Store(sys.argv[2])
    uid = store.begin_session(suite_name="crash", suite_path="crash.toml", suite_text="", profile_text="",
                              robot_id="bot", link="sim", seed=1, tool_version="test")
    for rep in range(1, 100000):
        run_id = store.begin_run(uid, "follow", rep, {"rep": rep})
        time.sleep(0.01)  # the robot is moving
        store.finish_run(run_id, "pass", {"rep": rep}, [], [("rep", float(rep), "", "robot")], telemetry)
    """
)


@pytest.mark.skipif(not hasattr(signal, "SIGKILL"), reason="needs SIGKILL")
def test_sigkill_mid_session_loses_no_finished_run(db: Path) -> None:
    child = subprocess.Popen([sys.executable, "-c", CHILD, str(REPO), str(db)], stderr=subprocess.PIPE)
    try:
        deadline = time.monotonic() + 20
        finished: list[int] = []
        while time.monotonic() < deadline and child.poll() is None:
            if db.exists():
                try:
                    with sqlite3.connect(db.as_uri() + "?mode=ro", uri=True) as conn:
                        rows = conn.execute("SELECT id, status FROM runs ORDER BY id").fetchall()
                except sqlite3.OperationalError:
                    rows = []  # schema not created yet
                finished = [run_id for run_id, status in rows if status == "pass"]
                if len(finished) >= 3 and rows[-1][1] == "running":
                    break
            time.sleep(0.005)
        assert child.poll() is None, child.stderr.read().decode() if child.stderr else ""
        assert len(finished) >= 3, "the child never finished 3 runs"
        os.kill(child.pid, signal.SIGKILL)
    finally:
        if child.poll() is None:
            os.kill(child.pid, signal.SIGKILL)
        child.wait()
        if child.stderr:
            child.stderr.close()
    assert child.returncode == -signal.SIGKILL

    with Store(db) as store:
        assert store._conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        uid = store.resolve_session("latest")
        assert store.session(uid)["status"] == "aborted"
        assert store.recovered.sessions == (uid,)
        runs = store.runs(uid).set_index("run_id")
        assert set(runs["status"]) <= {"pass", "aborted"}
        assert "running" not in set(runs["status"])
        assert set(finished) <= set(runs.index[runs["status"] == "pass"])
        aborted = runs[runs["status"] == "aborted"]
        assert len(aborted) <= 1 and (aborted["note"] == INTERRUPTED_RUN_NOTE).all()
        assert store.recovered.runs == len(aborted)
        measurements = store.measurements(uid).set_index("run_id")
        for run_id, run in runs[runs["status"] == "pass"].iterrows():
            assert run["result"] == {"rep": run["repetition"]}
            assert measurements.loc[run_id, "value"] == run["repetition"]
            frame = store.telemetry(run_id)
            assert len(frame) == 600 and frame["enc_right_deg"].tolist() == [-i for i in range(600)]


# ---------------------------------------------------------------- files that are not (our) stores


def test_newer_schema_is_refused_naming_both_versions(db: Path) -> None:
    Store(db).close()
    with sqlite3.connect(db) as conn:
        conn.execute(f"PRAGMA user_version = {SCHEMA_VERSION + 5}")
    for readonly in (False, True):
        with pytest.raises(StoreError) as caught:
            Store(db, readonly=readonly)
        text = str(caught.value)
        assert str(db) in text and f"version {SCHEMA_VERSION + 5}" in text and f"version {SCHEMA_VERSION}" in text
        assert caught.value.exit_code == 2 and isinstance(caught.value, TrackproofError)


def test_older_schema_is_migrated_or_refused(db: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    Store(db).close()
    monkeypatch.setattr(store_module, "SCHEMA_VERSION", SCHEMA_VERSION + 1)
    older = f"{db}: store schema version {SCHEMA_VERSION} is older .* cannot upgrade"
    with pytest.raises(StoreError, match=older):
        Store(db)

    def add_column(conn: sqlite3.Connection) -> None:
        conn.execute("ALTER TABLE runs ADD COLUMN operator TEXT")

    monkeypatch.setitem(store_module._MIGRATIONS, SCHEMA_VERSION, add_column)
    with pytest.raises(StoreError, match="open it once for recording"):
        Store(db, readonly=True)
    with Store(db) as store:
        assert store._conn.execute("PRAGMA user_version").fetchone()[0] == SCHEMA_VERSION + 1
        assert "operator" in [row[1] for row in store._conn.execute("PRAGMA table_info(runs)")]
        new_session(store)


def test_non_sqlite_file_is_refused_and_left_alone(tmp_path: Path) -> None:
    path = tmp_path / "notes.txt"
    path.write_bytes(b"stop spread was 3 mm at the venue\n" * 100)
    for readonly in (False, True):
        with pytest.raises(StoreError, match=f"{path}: not a trackproof results file"):
            Store(path, readonly=readonly)
    assert path.read_bytes() == b"stop spread was 3 mm at the venue\n" * 100
    assert sorted(p.name for p in tmp_path.iterdir()) == ["notes.txt"]


def test_other_sqlite_database_is_refused_and_left_alone(tmp_path: Path) -> None:
    path = tmp_path / "other.sqlite"
    with sqlite3.connect(path) as conn:
        conn.execute("CREATE TABLE t (x)")
    before = path.read_bytes()
    with pytest.raises(StoreError, match=f"{path}: an SQLite database, but not a trackproof results file"):
        Store(path)
    assert path.read_bytes() == before


def test_bad_paths_are_errors_not_tracebacks(tmp_path: Path) -> None:
    with pytest.raises(StoreError, match=f"{tmp_path}: is a directory"):
        Store(tmp_path)
    with pytest.raises(StoreError, match="the directory .*missing does not exist"):
        Store(tmp_path / "missing" / DEFAULT_DB)
    with pytest.raises(StoreError, match="no results file here"):
        Store(tmp_path / "absent.sqlite", readonly=True)
    assert not (tmp_path / "absent.sqlite").exists()
    with pytest.raises(StoreError, match=r"no session 'x'"):
        with Store(tmp_path / "fresh.sqlite") as store:
            store.runs("x")
