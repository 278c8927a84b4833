"""The host side of one conversation with a hub over a link.

hello() checks the protocol version, proves the shared secret if the profile has one, and checks
that the right robot answered; run() starts an action or routine, keeps the hub's watchdog fed,
and collects telemetry, events and the result, asking the hub to send lost telemetry batches
again. Commands are retransmitted with the same sequence number when no answer comes, which the
hub recognises, so nothing starts twice. On Ctrl-C or any error during a run, the robot is told
to stop first.
"""

from __future__ import annotations

import secrets

import numpy as np
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

from harness.errors import HubRefused, LinkError, ProtocolError
from harness.links.base import Link
from harness.telemetry import Telemetry, decode_batches
from hub_side import auth, wire

_AUTH_TRIES = 3


@dataclass(frozen=True)
class HubInfo:
    robot_id: str
    proto: int
    board: dict[str, Any]
    sensors: tuple[str, ...]
    actions: tuple[str, ...]
    routines: tuple[str, ...]
    control_period_us: int
    max_telemetry_hz: int
    geometry: dict[str, float]


@dataclass
class RunRecord:
    action: str
    params: dict[str, Any]
    result: dict[str, Any]
    events: list[dict[str, Any]]
    faults: list[dict[str, Any]]
    telemetry: Telemetry
    frames_lost: int = 0

    @property
    def status(self) -> str:
        return str(self.result.get("status", "unknown"))


@dataclass
class _Inbox:
    replies: dict[int, tuple[int, dict[str, Any]]] = field(default_factory=dict)
    hub_info: dict[str, Any] | None = None
    events: list[dict[str, Any]] = field(default_factory=list)
    faults: list[dict[str, Any]] = field(default_factory=list)
    telemetry: list[bytes] = field(default_factory=list)
    result: dict[str, Any] | None = None
    seen: set[int] = field(default_factory=set)  # hub seqs of this run's event/fault/result frames
    hub_idle: bool = False  # a pong said no action runs: a result we lack was lost on the way
    on_telemetry: Callable[[bytes], None] | None = None


def missing_ranges(index: np.ndarray, expected: int, most: int = 16) -> list[list[int]]:
    """[from, to) ranges of the sample indices below `expected` not in index, at most `most` of
    them (the rest merged into the last)."""
    seen = np.zeros(expected, dtype=bool)
    seen[index[(index >= 0) & (index < expected)]] = True
    step = np.diff(np.concatenate(([0], (~seen).astype(np.int8), [0])))
    ranges = [[int(a), int(b)] for a, b in zip(np.flatnonzero(step == 1), np.flatnonzero(step == -1))]
    if len(ranges) > most:
        ranges[most - 1:] = [[ranges[most - 1][0], ranges[-1][1]]]
    return ranges


class Session:
    def __init__(self, link: Link, *, watchdog_ms: int = 500, reply_timeout_s: float = 0.5,
                 retries: int = 4, session_id: str | None = None, secret: str | None = None,
                 resend_telemetry: bool = True) -> None:
        self.link = link
        self.secret = secret
        self.resend_telemetry = resend_telemetry
        self.watchdog_ms = watchdog_ms
        self.reply_timeout_s = reply_timeout_s
        self.retries = retries
        self.session_id = session_id or secrets.token_hex(4)
        self.protocol_version = wire.PROTOCOL_VERSION
        self.hub: HubInfo | None = None
        self._reader = wire.FrameReader()
        self._seq = 0
        self._last_sent = link.now()
        self._hub_seq: int | None = None
        self.frames_lost = 0
        self._inbox = _Inbox()
        self._hello_args: tuple[dict[str, float] | None, str | None] | None = None
        link.write(b"\x00")  # ends any partial frame the hub may hold

    # ------------------------------------------------------------ commands

    def hello(self, geometry: dict[str, float] | None = None, expect_robot_id: str | None = None) -> HubInfo:
        self._hello_args = (geometry, expect_robot_id)
        body: dict[str, Any] = {"proto": self.protocol_version, "session": self.session_id,
                                "watchdog_ms": self.watchdog_ms}
        if geometry:
            body["geometry"] = geometry
        inbox = self._inbox
        for _ in range(_AUTH_TRIES):
            inbox.hub_info = None
            kind, reply = self._command(wire.HELLO, body, lambda: inbox.hub_info is not None)
            if kind != wire.REFUSE or reply.get("code") != "auth" or not self.secret:
                break
            # The hub holds a secret: answer its challenge and say hello again.
            challenge = str(reply.get("challenge"))
            body = dict(body, challenge=challenge,
                        auth=auth.proof(self.secret, "host", challenge, self.session_id))
        if kind == wire.REFUSE:
            code = reply.get("code")
            if code == "auth" and self.secret:
                raise ProtocolError(f"the hub kept asking for proof after {_AUTH_TRIES} answers: the link "
                                    "may be losing frames; try again")
            if code == "protocol":
                raise ProtocolError(f"protocol mismatch: host speaks {self.protocol_version}, "
                                    f"hub speaks {reply.get('hub_proto')} ({reply.get('text')})")
            if code == "auth":
                raise ProtocolError("the hub wants proof of a shared secret: set [link] secret in the robot profile")
            if code == "auth_failed":
                raise ProtocolError("the hub refused our proof: the secret in the robot profile is not this hub's")
            raise HubRefused(str(code), str(reply.get("text")))
        info = inbox.hub_info
        assert info is not None
        if self.secret:
            challenge = str(body.get("challenge", ""))
            if not auth.same(info.get("proof"), auth.proof(self.secret, "hub", challenge, self.session_id)):
                raise ProtocolError(f"robot {info.get('robot_id')!r} answered without proof of the shared "
                                    "secret: not the robot this profile describes")
        self.hub = HubInfo(
            robot_id=str(info["robot_id"]), proto=int(info["proto"]), board=dict(info.get("board", {})),
            sensors=tuple(info["sensors"]), actions=tuple(info["actions"]),
            routines=tuple(info.get("routines", ())), control_period_us=int(info["control_period_us"]),
            max_telemetry_hz=int(info["max_telemetry_hz"]), geometry=dict(info.get("geometry", {})),
        )
        if expect_robot_id is not None and self.hub.robot_id != expect_robot_id:
            raise ProtocolError(f"wrong robot: expected {expect_robot_id!r}, but {self.hub.robot_id!r} answered")
        return self.hub

    def run(self, action: str, params: dict[str, Any] | None = None, *, telemetry_hz: int = 100,
            timeout_s: float | None = None,
            on_telemetry: Callable[[bytes], None] | None = None) -> RunRecord:
        """Run one action or routine to its end and return everything it reported.
        on_telemetry sees each telemetry batch body as it arrives (e.g. to stop a run early)."""
        if self.hub is None:
            raise ProtocolError("hello() must come before run()")
        params = dict(params or {})
        inbox = self._inbox
        inbox.events, inbox.faults, inbox.telemetry, inbox.result = [], [], [], None
        inbox.seen, inbox.hub_idle, inbox.on_telemetry = set(), False, on_telemetry
        lost_before = self.frames_lost
        if timeout_s is None:
            timeout_s = float(params.get("timeout_s", 30.0)) + 5.0
        try:
            start = {"action": action, "params": params, "telemetry_hz": telemetry_hz}
            reply = self._command(wire.START, start)
            if reply[0] == wire.REFUSE and reply[1].get("code") == "no_hello" and self._hello_args:
                # The hub dropped our session (it holds a secret and we were quiet too long).
                self.hello(*self._hello_args)
                reply = self._command(wire.START, start)
            if reply[0] == wire.REFUSE:
                raise HubRefused(str(reply[1].get("code")), str(reply[1].get("text")))
            deadline = self.link.now() + timeout_s
            while inbox.result is None:
                if self.link.now() > deadline:
                    raise LinkError(f"no result for {action} within {timeout_s:.1f} s")
                if inbox.hub_idle:
                    inbox.hub_idle = False
                    self._command(wire.RESEND, {"results": True, "ranges": []})  # the result was lost
                    continue
                now = self.link.now()
                self._wait(max(0.0, min(self._last_sent + self._ping_interval_s(), deadline) - now))
        except HubRefused:
            raise
        except BaseException:
            self.stop_robot()
            raise
        result = inbox.result
        expected = result.get("samples")
        expected = expected if isinstance(expected, int) and not isinstance(expected, bool) else None
        telemetry = decode_batches(inbox.telemetry, self.hub.sensors, expected)
        try:
            if self.frames_lost > lost_before:
                # An event or fault may have been among the lost frames: have them all again.
                self._command(wire.RESEND, {"results": True, "ranges": []})
            if telemetry.dropped and self.resend_telemetry and expected:
                telemetry = self._recover_telemetry(telemetry, expected)
        except LinkError:
            pass  # keep what arrived: the run is stored, marked incomplete by its telemetry
        return RunRecord(action, params, result, list(inbox.events), list(inbox.faults), telemetry,
                         self.frames_lost - lost_before)

    def _recover_telemetry(self, telemetry: Telemetry, expected: int) -> Telemetry:
        """Ask the hub for the batches holding missing samples until none are missing, or it has
        none of them left; returns the telemetry as complete as it could be made."""
        assert self.hub is not None
        inbox = self._inbox
        for _ in range(self.retries + 1):
            kind, reply = self._command(wire.RESEND, {"ranges": missing_ranges(telemetry.index, expected)})
            # The batches come before the hub's answer; give stragglers a moment to land.
            self._wait(self.reply_timeout_s / 4, ping=False)
            before = telemetry.dropped
            telemetry = decode_batches(inbox.telemetry, self.hub.sensors, expected)
            # Stop when whole, refused, or the hub no longer has what is missing and nothing came.
            if not telemetry.dropped or kind == wire.REFUSE or (not reply.get("complete", True)
                                                               and telemetry.dropped >= before):
                break
        return telemetry

    def stop_robot(self) -> None:
        """Tell the hub to stop now; best effort, never raises (used on the way out of errors)."""
        try:
            frame = wire.encode_message(wire.STOP, self._next_seq(), {})
            for _ in range(2):
                self.link.write(frame)
            self._last_sent = self.link.now()
        except Exception:  # the link may be what failed; the hub's watchdog is the backstop
            pass

    def close(self) -> None:
        self.link.close()

    # ------------------------------------------------------------ plumbing

    def _ping_interval_s(self) -> float:
        return self.watchdog_ms / 1000.0 / 4.0

    def _next_seq(self) -> int:
        self._seq = (self._seq % 0xFFFF) + 1
        return self._seq

    def _command(self, msg_type: int, body: dict[str, Any], answered=None) -> tuple[int, dict[str, Any]]:
        """Send a command and wait for its answer, retransmitting the same frame if none comes."""
        seq = self._next_seq()
        frame = wire.encode_message(msg_type, seq, body)
        inbox = self._inbox
        name = wire.MESSAGE_NAMES[msg_type]
        for _attempt in range(self.retries + 1):
            self.link.write(frame)
            self._last_sent = self.link.now()
            deadline = self._last_sent + self.reply_timeout_s
            while self.link.now() < deadline:
                if answered is not None and answered():
                    return (wire.ACK, {})
                if seq in inbox.replies:
                    return inbox.replies.pop(seq)
                self._wait(deadline - self.link.now(), ping=False)
            if answered is not None and answered():
                return (wire.ACK, {})
            if seq in inbox.replies:
                return inbox.replies.pop(seq)
        raise LinkError(f"no answer from the hub to {name} after {self.retries + 1} tries "
                        f"({self.reply_timeout_s:.1f} s each) on link {self.link.name}")

    def _wait(self, timeout_s: float, ping: bool = True) -> None:
        data = self.link.read(max(0.0, timeout_s))
        if data:
            for msg_type, seq, body in self._reader.feed(data):
                self._track_seq(seq)
                self._dispatch(msg_type, seq, body)
        if ping and self.link.now() - self._last_sent >= self._ping_interval_s():
            self.link.write(wire.encode_message(wire.PING, self._next_seq(), {}))
            self._last_sent = self.link.now()

    def _track_seq(self, seq: int) -> None:
        # The hub numbers every frame it sends; a gap means frames were lost on the way. A frame
        # sent again keeps its old number: it is behind, and neither a gap nor the new latest.
        if self._hub_seq is not None:
            gap = (seq - self._hub_seq - 1) & 0xFFFF
            if gap >= 0x8000:
                return
            self.frames_lost += gap
        self._hub_seq = seq

    def _dispatch(self, msg_type: int, seq: int, body: bytes) -> None:
        inbox = self._inbox
        if msg_type == wire.TELEMETRY:
            inbox.telemetry.append(bytes(body))
            if inbox.on_telemetry is not None:
                inbox.on_telemetry(inbox.telemetry[-1])
            return
        if msg_type in (wire.EVENT, wire.FAULT, wire.RESULT):
            if seq in inbox.seen:
                return  # sent again on request, and we have it already
            inbox.seen.add(seq)
        try:
            msg = wire.decode_json(body)
        except wire.FrameError:
            return
        if msg_type == wire.HUB_INFO:
            inbox.hub_info = msg
        elif msg_type in (wire.ACK, wire.REFUSE):
            if isinstance(msg.get("ref"), int):
                inbox.replies[msg["ref"]] = (msg_type, msg)
        elif msg_type == wire.EVENT:
            inbox.events.append(msg)
        elif msg_type == wire.FAULT:
            inbox.faults.append(msg)
        elif msg_type == wire.RESULT:
            inbox.result = msg
        elif msg_type == wire.PONG and msg.get("busy") is False and inbox.result is None:
            inbox.hub_idle = True
