"""The hub listener: one cooperative loop that serves the host over a link.

Each tick() reads link bytes, dispatches commands, advances the running action once per control
period, samples telemetry at the requested rate, and stops the motors if the host has been
silent longer than the watchdog time. Only the built-in actions and routines registered by name
ever run; nothing received is evaluated as code.

A routine is a generator function routine(ctx, params) registered with @listener.routine("name").
It yields once per control period, may run built-in actions with `yield from ctx.run(name,
params)`, and returns a dict of what it measured.
"""

from hub_side import auth, wire
from hub_side.actions import BUILTINS
from hub_side.board import ticks_diff
from hub_side.motion import (DEFAULT_GEOMETRY, GEOMETRY_LIMITS, MESSAGE_CHARS, ParamError, check_params, clip,
                             is_finite_number, is_whole, shown, travel_factors, travel_from)

MAX_TELEMETRY_HZ = 500
DEFAULT_TELEMETRY_HZ = 100
DEFAULT_WATCHDOG_MS = 500
IDLE_POLL_US = 5000
_BATCH_MAX_SPAN_US = 200000  # flush telemetry at least this often so the host sees it live
_REPLY_CACHE = 16
_STALL_US = 400000
_STALL_MIN_PCT = 15
DEFAULT_KEEP_TELEMETRY_BYTES = 16384  # the current action's batches kept for a RESEND
_RESEND_RANGES = 16


class ActionContext:
    """What an action or routine sees: the board through a few measured helpers, the robot's
    geometry, its own elapsed time, and a way to emit events. Distances and heading changes are
    measured from the moment this action started."""

    def __init__(self, listener, t_start_us):
        board = listener.board
        self.board = board
        self.geometry = listener.geometry
        self.period_us = listener.period_us
        self.t_start_us = t_start_us
        self.t_us = 0
        self.error_pct = 0.0
        self._listener = listener
        self._travel = travel_factors(listener.geometry)
        self.enc_start = listener.read_encoders()
        self.heading_start = listener.read_heading()

    def set_power(self, left_pct, right_pct):
        self._listener.power = (left_pct, right_pct)
        self.board.set_power(left_pct, right_pct)

    def encoders(self):
        return self._listener.read_encoders()

    def heading(self):
        return self._listener.read_heading()

    def reflectance(self, name):
        return self._listener.read_reflectance(name)

    def distance_mm(self):
        """Signed travel of the axle midpoint since this action started (each wheel at its own
        millimetres per degree when the geometry's wheel_ratio is not 1)."""
        left, right = self._listener.read_encoders()
        start = self.enc_start
        return travel_from(left - start[0], right - start[1], self._travel)

    def event(self, kind, fields=None):
        self._listener.send_event(kind, fields)

    def run(self, name, params):
        """Run a built-in action inside a routine: `result = yield from ctx.run("turn", {...})`."""
        if name not in BUILTINS:
            raise ValueError("unknown action %r" % name)
        fn, spec = BUILTINS[name]
        p = check_params(spec, params, self._listener.sensor_names)
        child = ActionContext(self._listener, self._listener.t_us)
        self._listener.contexts.append(child)
        try:
            result = yield from fn(child, p)
        finally:
            self._listener.contexts.pop()
        out = child.measurements()
        out.update(result or {})
        return out

    def measurements(self):
        left, right = self._listener.read_encoders()
        return {
            "distance_mm": round(self.distance_mm(), 2),
            "heading_change_deg": round(self._listener.read_heading() - self.heading_start, 2),
            "enc_left_deg": left - self.enc_start[0],
            "enc_right_deg": right - self.enc_start[1],
            "duration_s": round(self.t_us / 1e6, 4),
        }


class Listener:
    def __init__(self, board, robot_id="robot", control_period_us=10000, geometry=None, secret=None,
                 keep_telemetry_bytes=DEFAULT_KEEP_TELEMETRY_BYTES):
        self.board = board
        if secret and not auth.STRONG_RANDOM:
            raise ValueError("a shared secret needs os.urandom, which this port lacks: its challenges "
                             "would be predictable")
        self.secret = secret  # set: only a host that proves it knows this may say hello
        self.robot_id = robot_id
        self.period_us = control_period_us
        self.geometry = dict(DEFAULT_GEOMETRY)
        if geometry:
            self.geometry.update(geometry)
        self.sensor_names = tuple(board.sensor_names)
        self.routines = {}
        self.power = (0, 0)
        self.t_us = 0
        self.contexts = []
        self._reader = wire.FrameReader()
        self._tx_seq = 0
        self._session = None
        self._watchdog_us = DEFAULT_WATCHDOG_MS * 1000
        self._replies = {}
        self._reply_order = []
        self._last_rx_us = board.ticks_us()
        self._gen = None
        self._batch = wire.TelemetryBatch(len(self.sensor_names))
        self._enc = None
        self._heading = None
        self._refl_now = {}
        self._challenge = None
        self._keep_bytes = keep_telemetry_bytes
        self._kept = []  # (first_index, body) of this action's batches, oldest first
        self._kept_size = 0
        self._samples_unsent = 0
        self._run_frames = []  # this action's event, fault and result frames, for a RESEND
        board.link_write(b"\x00")  # ends any partial frame the host may hold

    # ------------------------------------------------------------ registration

    def routine(self, name, spec=None):
        """Decorator registering a team routine under name; spec checks its parameters."""

        def register(fn):
            self.routines[name] = (fn, spec)
            return fn

        return register

    # ------------------------------------------------------------ readings
    #
    # Each reading is taken at most once per tick: the control step and the telemetry sample of
    # the same tick share it, so telemetry shows exactly what the controller saw, and costs no
    # second trip to the hardware.

    def read_encoders(self):
        enc = self._enc
        if enc is None:
            enc = self._enc = self.board.encoders_deg()
        return enc

    def read_heading(self):
        heading = self._heading
        if heading is None:
            heading = self._heading = self.board.heading_deg()
        return heading

    def read_reflectance(self, name):
        seen = self._refl_now
        value = seen.get(name)
        if value is None:
            value = seen[name] = self.board.reflectance_pct(name)
        return value

    def _fresh_readings(self):
        self._enc = None
        self._heading = None
        self._refl_now.clear()

    # ------------------------------------------------------------ the loop

    def serve(self):
        """Run forever on a real board."""
        while True:
            self.board.idle_us(min(self.tick(), 2000))

    def tick(self):
        """One pass of the loop; returns how many microseconds until something is due."""
        board = self.board
        now = board.ticks_us()
        self._fresh_readings()
        data = board.link_read()
        if data:
            for msg_type, seq, body in self._reader.feed(data):
                self._last_rx_us = now
                self._handle(msg_type, seq, body)
        if self.secret and self._session is not None and self._gen is None \
                and ticks_diff(now, self._last_rx_us) > self._watchdog_us:
            # A host that proved the secret and then fell silent no longer holds the hub: the
            # next host (another central, after a drop) must prove it again.
            self._session = None
        if self._gen is None:
            return IDLE_POLL_US
        self.t_us += ticks_diff(now, self._last_tick_us)
        self._last_tick_us = now
        for ctx in self.contexts:
            ctx.t_us = self.t_us - ctx.t_start_us
        if ticks_diff(now, self._last_rx_us) > self._watchdog_us:
            self._finish("watchdog", None, ("watchdog", "host silent for more than %d ms" % (self._watchdog_us // 1000)))
            return IDLE_POLL_US
        if board.button_pressed():
            self.send_event("button", None)
            self._finish("stopped", None)
            return IDLE_POLL_US
        if self.t_us >= self._next_control_us:
            self._step()
            self._next_control_us += self.period_us
            if self._next_control_us <= self.t_us:
                self._next_control_us = self.t_us + self.period_us
        if self._gen is None:
            return 0
        due = self._next_control_us
        if self._telemetry_us:
            if self.t_us >= self._next_sample_us:
                self._sample()
                self._next_sample_us += self._telemetry_us
                if self._next_sample_us <= self.t_us:
                    self._next_sample_us = self.t_us + self._telemetry_us
            if self._next_sample_us < due:
                due = self._next_sample_us
        return max(0, due - self.t_us)

    def _step(self):
        ctx = self.contexts[0]
        try:
            next(self._gen)
        except StopIteration as done:
            result = done.args[0] if done.args else None
            self._finish("done", result)
            return
        except Exception as exc:  # an action or routine failed: stop, report, keep serving
            self._finish("error", None, ("action_error", clip("%s: %s" % (type(exc).__name__, exc), MESSAGE_CHARS)))
            return
        if self.t_us > self._timeout_us:
            self.send_event("timeout", {"after_s": self._timeout_us / 1e6})
            self._finish("timeout", None)
            return
        self._check_stall(ctx)

    def _check_stall(self, ctx):
        enc = self.read_encoders()
        pushing = abs(self.power[0]) >= _STALL_MIN_PCT or abs(self.power[1]) >= _STALL_MIN_PCT
        if enc != self._stall_enc or not pushing:
            self._stall_enc = enc
            self._stall_since_us = self.t_us
        elif self.t_us - self._stall_since_us > _STALL_US:
            self.send_event("stall", {"power_pct": [self.power[0], self.power[1]]})
            self._finish("stalled", None)

    def _sample(self):
        root = self.contexts[0]
        left, right = self.read_encoders()
        refl = self._refl
        seen = self._refl_now  # read_reflectance inlined: this runs for every sample
        board = self.board
        i = 0
        for name in self.sensor_names:
            value = seen.get(name)
            if value is None:
                value = seen[name] = board.reflectance_pct(name)
            value = int(value)
            refl[i] = value if 0 <= value <= 255 else min(255, max(0, value))
            i += 1
        batch = self._batch
        power = self.power
        batch.add(self.t_us, left - root.enc_start[0], right - root.enc_start[1], self.read_heading(),
                  self.contexts[-1].error_pct, power[0], power[1], refl)
        self._sample_index += 1
        if batch.count >= batch.max_samples or self.t_us - batch.t0_us >= _BATCH_MAX_SPAN_US:
            self._flush_telemetry()

    def _flush_telemetry(self):
        batch = self._batch
        if batch.count:
            body = batch.body(self.board.battery_mv())
            self._keep(batch.first_index, body)
            # A link too slow for this rate: drop the batch (the host sees the gap) rather than
            # block the control loop on a full transmit buffer.
            if self.board.link_room() >= len(body) + len(body) // 254 + 7:
                self._send_frame(wire.TELEMETRY, body)
            else:
                self._samples_unsent += batch.count
        batch.reset(self._sample_index)

    def _keep(self, first_index, body):
        kept = self._kept
        kept.append((first_index, body))
        self._kept_size += len(body)
        while self._kept_size > self._keep_bytes and kept:
            self._kept_size -= len(kept.pop(0)[1])

    def _resend(self, seq, body, msg):
        """Send again what the host lost of the current or last action: its event, fault and
        result frames (as they were) when asked, and the kept telemetry batches holding samples
        in any of the [from, to) ranges; the answer says whether every asked sample was kept."""
        ranges = msg.get("ranges", [])
        good = isinstance(ranges, list) and len(ranges) <= _RESEND_RANGES
        for pair in ranges if good else ():
            good = good and isinstance(pair, list) and len(pair) == 2 and is_whole(pair[0]) and is_whole(pair[1])
        if not good:
            self._reply(seq, wire.RESEND, body, wire.REFUSE, {"ref": seq, "code": "bad_param",
                        "text": "ranges: expected at most %d [from, to) pairs of whole numbers" % _RESEND_RANGES})
            return
        if msg.get("results"):
            for frame in self._run_frames:
                self.board.link_write(frame)
        n_sensors = len(self.sensor_names)
        sent = 0
        missing = 0
        for first, end in ranges:
            covered = first
            for index, kept in self._kept:
                count = (len(kept) - wire.TELEMETRY_HEADER_BYTES) // wire.telemetry_sample_bytes(n_sensors)
                if index < end and index + count > first:
                    self._send_frame(wire.TELEMETRY, kept)
                    sent += 1
                    if index <= covered:
                        covered = max(covered, index + count)
            if covered < end:
                missing += 1
        self._reply(seq, wire.RESEND, body, wire.ACK, {"ref": seq, "batches": sent, "complete": missing == 0,
                                                        "busy": self._gen is not None})

    # ------------------------------------------------------------ actions

    def _start(self, name, params, telemetry_hz):
        """Start an action or routine; returns None or (code, text) for a refusal."""
        if isinstance(name, str) and name in BUILTINS:
            fn, spec = BUILTINS[name]
        elif isinstance(name, str) and name in self.routines:
            fn, spec = self.routines[name]
        else:
            known = sorted(list(BUILTINS) + list(self.routines))
            return ("unknown_action", "no action or routine %s (known: %s)" % (shown(name), ", ".join(known)))
        if not isinstance(params, dict):
            return ("bad_param", "params must be an object")
        if spec is not None:
            try:
                params = check_params(spec, params, self.sensor_names)
            except ParamError as exc:
                return ("bad_param", str(exc))
        if not is_finite_number(telemetry_hz) or not (telemetry_hz == 0 or 1 <= telemetry_hz <= MAX_TELEMETRY_HZ):
            return ("bad_param", "telemetry_hz: must be 0 (off) or between 1 and %d" % MAX_TELEMETRY_HZ)
        self.t_us = 0
        self._last_tick_us = self.board.ticks_us()
        ctx = ActionContext(self, 0)
        self.contexts = [ctx]
        self._action = name
        self._telemetry_us = int(1e6 / telemetry_hz) if telemetry_hz else 0
        self._next_sample_us = 0
        self._next_control_us = self.period_us
        self._sample_index = 0
        self._batch.reset(0)
        self._kept = []
        self._kept_size = 0
        self._samples_unsent = 0
        self._run_frames = []
        self._refl = [0] * len(self.sensor_names)
        self._timeout_us = int(params.get("timeout_s", 3600) * 1e6) if spec is not None else 3600 * 1000000
        self._stall_enc = None
        self._stall_since_us = 0
        gen = fn(ctx, params)
        # The first step runs now, so a parameter combination the action rejects is a refusal.
        try:
            next(gen)
        except StopIteration as done:
            self._gen = gen
            self._pending_result = done.args[0] if done.args else None
            return None
        except Exception as exc:  # refused before anything moved for long
            self.board.set_power(0, 0)
            self.power = (0, 0)
            self.contexts = []
            code = "bad_param" if isinstance(exc, ValueError) else "action_error"
            return (code, clip(str(exc), MESSAGE_CHARS))
        self._gen = gen
        self._pending_result = None
        return None

    def _finish(self, status, result, fault=None):
        self.board.set_power(0, 0)
        self.power = (0, 0)
        gen = self._gen
        self._gen = None
        if gen is not None:
            gen.close()
        if self._telemetry_us:
            self._sample()
        self._flush_telemetry()
        if fault is not None:
            self._send_kept(wire.FAULT, {"code": fault[0], "text": fault[1]})
        out = self.contexts[0].measurements()
        if result is None:
            result = self._pending_result
        if result:
            out.update(result)
        if "status" not in out or status != "done":
            out["status"] = status
        out["action"] = self._action
        out["samples"] = self._sample_index
        if self._samples_unsent:
            out["samples_unsent"] = self._samples_unsent
        self._send_kept(wire.RESULT, out)
        self.contexts = []

    # ------------------------------------------------------------ messages

    def _handle(self, msg_type, seq, body):
        if msg_type == wire.PING:
            # busy tells a host still waiting for a result that the action has ended (its result
            # frame was lost, and RESEND can fetch it).
            self._send_json(wire.PONG, {"ref": seq, "busy": self._gen is not None})
            return
        if msg_type not in (wire.HELLO, wire.START, wire.STOP, wire.RESEND):
            return  # hub-to-host types or unknown: ignore, never act on them
        cached = self._replies.get(seq)
        if cached is not None and cached[0] == msg_type and cached[1] == body:
            self.board.link_write(cached[2])  # a retransmission: answer again, do nothing twice
            return
        try:
            msg = wire.decode_json(body)
        except wire.FrameError as exc:
            self._reply(seq, msg_type, body, wire.REFUSE, {"ref": seq, "code": "bad_message", "text": str(exc)})
            return
        if msg_type == wire.HELLO:
            self._hello(seq, body, msg)
        elif self._session is None:
            self._reply(seq, msg_type, body, wire.REFUSE, {"ref": seq, "code": "no_hello", "text": "send a hello first"})
        elif msg_type == wire.START:
            self._start_command(seq, body, msg)
        elif msg_type == wire.RESEND:
            self._resend(seq, body, msg)
        else:
            if self._gen is not None:
                self._finish("stopped", None)
            self._reply(seq, msg_type, body, wire.ACK, {"ref": seq})

    def _hello(self, seq, body, msg):
        proto = msg.get("proto")
        if proto != wire.PROTOCOL_VERSION:
            text = "hub %s speaks protocol %d, host speaks %s" % (self.robot_id, wire.PROTOCOL_VERSION, shown(proto))
            self._send_json(wire.REFUSE, {"ref": seq, "code": "protocol", "text": text, "hub_proto": wire.PROTOCOL_VERSION})
            return
        watchdog_ms = msg.get("watchdog_ms", DEFAULT_WATCHDOG_MS)
        geometry = msg.get("geometry", {})
        problem = None
        if not is_finite_number(watchdog_ms) or not 50 <= watchdog_ms <= 60000:
            problem = "watchdog_ms: must be between 50 and 60000"
        elif not isinstance(geometry, dict):
            problem = "geometry: must be an object"
        else:
            for key in geometry:
                value = geometry[key]
                if key not in GEOMETRY_LIMITS:
                    problem = "geometry.%s: unknown key" % clip(key)
                    break
                low, high = GEOMETRY_LIMITS[key]
                if not is_finite_number(value) or not low <= value <= high:
                    problem = "geometry.%s: must be a number between %s and %s" % (key, low, high)
                    break
        if problem is not None:
            self._send_json(wire.REFUSE, {"ref": seq, "code": "bad_param", "text": problem})
            return
        session = msg.get("session", "")
        hub_proof = None
        if self.secret:
            challenge, self._challenge = self._challenge, None  # each challenge is good for one try
            offered = msg.get("auth")
            if offered is None or challenge is None or msg.get("challenge") != challenge:
                self._challenge = auth.new_challenge()
                # Cached like any reply: a retransmitted hello gets this same challenge back.
                self._reply(seq, wire.HELLO, body, wire.REFUSE, {"ref": seq, "code": "auth", "challenge": self._challenge,
                            "text": "this hub needs proof of the shared secret"})
                return
            if not auth.same(offered, auth.proof(self.secret, "host", challenge, str(session))):
                self._send_json(wire.REFUSE, {"ref": seq, "code": "auth_failed",
                                              "text": "wrong proof: the host's secret is not this hub's"})
                return
            hub_proof = auth.proof(self.secret, "hub", challenge, str(session))
        if self._gen is not None:
            self._finish("stopped", None)  # a new host took over: never leave a move running
        self._session = session
        self._replies = {}
        self._reply_order = []
        self._watchdog_us = int(watchdog_ms * 1000)
        self.geometry = dict(DEFAULT_GEOMETRY)
        self.geometry.update(geometry)
        info = {
            "proto": wire.PROTOCOL_VERSION,
            "robot_id": self.robot_id,
            "board": self.board.capabilities,
            "sensors": list(self.sensor_names),
            "actions": sorted(BUILTINS),
            "routines": sorted(self.routines),
            "control_period_us": self.period_us,
            "max_telemetry_hz": MAX_TELEMETRY_HZ,
            "geometry": self.geometry,
        }
        if hub_proof is not None:
            info["proof"] = hub_proof
        self._reply(seq, wire.HELLO, body, wire.HUB_INFO, info)

    def _start_command(self, seq, body, msg):
        if self._gen is not None:
            refusal = ("busy", "%s is still running" % self._action)
        else:
            refusal = self._start(msg.get("action"), msg.get("params", {}), msg.get("telemetry_hz", DEFAULT_TELEMETRY_HZ))
        if refusal is None:
            self._reply(seq, wire.START, body, wire.ACK, {"ref": seq})
        else:
            self._reply(seq, wire.START, body, wire.REFUSE, {"ref": seq, "code": refusal[0], "text": refusal[1]})

    def _reply(self, seq, msg_type, body, reply_type, obj):
        frame = self._frame_json(reply_type, obj)
        self._replies[seq] = (msg_type, bytes(body), frame)
        self._reply_order.append(seq)
        if len(self._reply_order) > _REPLY_CACHE:
            old = self._reply_order.pop(0)
            if old in self._replies and old not in self._reply_order:
                del self._replies[old]
        self.board.link_write(frame)

    def send_event(self, kind, fields=None):
        event = {"kind": kind, "t_s": self.t_us / 1e6}
        if fields:
            event.update(fields)
        self._send_kept(wire.EVENT, event)

    def _send_kept(self, msg_type, obj):
        """Send a frame the host must not miss, and keep it for a RESEND."""
        frame = self._frame_json(msg_type, obj)
        self._run_frames.append(frame)
        self.board.link_write(frame)

    def _send_json(self, msg_type, obj):
        self.board.link_write(self._frame_json(msg_type, obj))

    def _frame_json(self, msg_type, obj):
        self._tx_seq = (self._tx_seq + 1) & 0xFFFF
        return wire.encode_message(msg_type, self._tx_seq, obj)

    def _send_frame(self, msg_type, body):
        self._tx_seq = (self._tx_seq + 1) & 0xFFFF
        self.board.link_write(wire.encode_frame(msg_type, self._tx_seq, body))
