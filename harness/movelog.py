"""Every move a calibration or tuning command makes, kept in the results store.

`trackproof run` stores each run of a suite the moment it ends. The calibrate and tune commands
drive the robot as much, so their moves go into the same store: one session per command, named
after it ("calibrate turns"), one case per kind of move ("spin +90 deg", "kp 0.4000 kd 0.00000"),
each move a run with its result, events, measurements and telemetry. `trackproof sessions` and `show`
list them and `trackproof compare` can set two of them side by side (the same turns before and
after a rebuild). The session's stored text is the command and its options, not a suite.

The session begins with the first move, so a command refused before the robot moves leaves
nothing behind, and each move is committed as it ends, so a lost link or Ctrl-C keeps the moves
already made.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from importlib.metadata import version
from pathlib import Path
from typing import Any

import tomlkit

from harness.errors import HubRefused, LinkError, ProtocolError
from harness.measure import measure_run
from harness.robot import RobotConnector
from harness.runner import redact_secret
from harness.session import RunRecord, Session
from harness.sim import truth_report, truth_snapshot
from harness.store import Store, record_while_failing
from harness.suites import Step

# Measurements that need the tape's width (a probed stop's distance to the line's centre) are
# left out: a calibration probes to a line's edge, and no suite says how wide the tape is.
NO_LINE_WIDTH = math.nan


class MoveLog:
    """Runs a move on the session and stores it as a run of `case`; MoveLog() stores nothing."""

    def __init__(self, store: Store | None = None, connector: RobotConnector | None = None, command: str = "",
                 options: dict[str, Any] | None = None) -> None:
        if store is not None and connector is None:
            raise ValueError("storing moves needs the robot's connector (its profile, link and simulator)")
        self.store = store
        self.connector = connector
        self.command = command
        self.options = options or {}
        self.uid: str | None = None  # the session, once the first move is stored
        self.moves = 0
        self._open = False
        self._repetitions: dict[str, int] = {}

    def run(self, session: Session, case: str, action: str, params: dict[str, Any],
            explain: Callable[[RunRecord], str] | None = None, **run_options: Any) -> RunRecord:
        """session.run(action, params, **run_options), then the move stored, with what `explain`
        says of it in the run's note; a move that ends in an exception is stored too (fail,
        link_lost or aborted) before the exception goes on."""
        if self.store is None or self.connector is None:
            return session.run(action, params, **run_options)
        sim = self.connector.sim
        before = truth_snapshot(sim) if sim is not None else None
        try:
            record = session.run(action, params, **run_options)
        except BaseException as exc:
            status = ("fail" if isinstance(exc, HubRefused) else
                      "link_lost" if isinstance(exc, (LinkError, ProtocolError)) else "aborted")
            # A store that fails now must not hide why the move failed: say so, raise the first.
            note = f"{type(exc).__name__}: {exc}".rstrip(": ")
            record_while_failing(lambda: self._store(case, action, params, status, None, None, note=note))
            raise
        truth = truth_report(before, truth_snapshot(sim)) if before is not None and sim is not None else None
        if record.telemetry.dropped:
            status, note = "link_lost", f"telemetry incomplete: {record.telemetry.dropped} samples lost on the link"
        elif record.status == "done":
            status, note = "pass", ""
        else:
            status, note = "fail", f"{action} ended {record.status}"
        said = explain(record) if explain is not None else ""
        self._store(case, action, params, status, record, truth, note="; ".join(n for n in (note, said) if n))
        return record

    def close(self, finished: bool) -> None:
        """End the session: 'finished', or 'aborted' when the command stopped part way."""
        if self.store is not None and self.uid is not None and self._open:
            self._open = False
            self.store.end_session(self.uid, "finished" if finished else "aborted")

    def kept(self) -> str:
        """Where the moves went, for the end of a command's report."""
        if self.store is None or self.uid is None:
            return "no moves were stored"
        return (f"{self.moves} moves kept in {self.store.path} as session {self.uid} "
                f"(trackproof show {self.uid} --db {self.store.path})")

    def __enter__(self) -> MoveLog:
        return self

    def __exit__(self, exc_type: type[BaseException] | None, *rest: object) -> None:
        if exc_type is None:
            self.close(True)
        else:
            record_while_failing(lambda: self.close(False))

    # ------------------------------------------------------------ storing

    def _begin(self) -> str:
        assert self.store is not None and self.connector is not None
        profile = self.connector.profile
        text = Path(profile.source).read_text(encoding="utf-8") if profile.source else ""
        described = tomlkit.document()
        described.add(tomlkit.comment(f"Moves made by `trackproof {self.command}`; not a suite to run."))
        described["command"] = self.command
        described["options"] = {k: v for k, v in self.options.items() if v is not None}
        return self.store.begin_session(
            suite_name=self.command, suite_path="", suite_text=tomlkit.dumps(described),
            profile_text=redact_secret(text), robot_id=profile.id, link=self.connector.link_name,
            seed=self.connector.seed, tool_version=version("trackproof"))

    def _store(self, case: str, action: str, params: dict[str, Any], status: str, record: RunRecord | None,
               truth: dict[str, Any] | None, note: str) -> None:
        assert self.store is not None
        if self.uid is None:
            self.uid = self._begin()
            self._open = True
        self.moves += 1
        repetition = self._repetitions[case] = self._repetitions.get(case, 0) + 1
        run_id = self.store.begin_run(self.uid, case, repetition, {"steps": [params]})
        if record is None:
            self.store.finish_run(run_id, status, {}, [], [], None, note=note)
            return
        measurements = measure_run((Step(action, params),), [record], [truth], NO_LINE_WIDTH)
        self.store.finish_run(run_id, status, {"steps": [record.result]}, list(record.events),
                              [m.as_tuple() for m in measurements], record.telemetry, note=note)
