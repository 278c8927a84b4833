"""The robot profile: what the team believes about its robot (TOML).

    id = "..."                         # the robot id its hub reports in the hello
    wheel_diameter_mm, track_mm
    distance_scale, spin_scale, pivot_scale   # correction factors (default 1.0)
    wheel_ratio                               # right over left wheel diameter, UMBmark's E_d
                                              # (default 1.0, 0.9 to 1.1); wheel_diameter_mm
                                              # is then their average
    spin_offset_deg, pivot_offset_deg         # degrees encoder turns go on past their target
                                              # (the coast; default 0, -30 to 30)
    [sensors.NAME] forward_mm, left_mm        # reflectance sensors in the robot frame
    [follow.forward] / [follow.backward]      # sensors (pair listed left first, or one edge
                                              # sensor), edge, kp, kd, speed_pct
    [junctions] left, right, threshold_pct    # sensors that see side branches
    [link] watchdog_ms, baud, secret, reconnects, scan_timeout_s
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

from harness.tomlfile import Table, load_toml
from hub_side.motion import DEFAULT_GEOMETRY, GEOMETRY_LIMITS


@dataclass(frozen=True)
class SensorPlace:
    forward_mm: float
    left_mm: float


@dataclass(frozen=True)
class FollowSettings:
    sensors: tuple[str, ...]
    edge: str = "left"
    kp: float = 0.6
    kd: float = 0.0
    speed_pct: float = 40.0


@dataclass(frozen=True)
class RobotProfile:
    id: str
    wheel_diameter_mm: float
    track_mm: float
    sensors: dict[str, SensorPlace]
    follow: dict[str, FollowSettings]
    junction_left: str = ""
    junction_right: str = ""
    threshold_pct: float = 60.0
    distance_scale: float = 1.0
    spin_scale: float = 1.0
    pivot_scale: float = 1.0
    wheel_ratio: float = 1.0  # D_right / D_left around wheel_diameter_mm (calibrate odometry)
    spin_offset_deg: float = 0.0  # encoder turns aim this much short (calibrate turns)
    pivot_offset_deg: float = 0.0
    watchdog_ms: int = 500
    baud: int = 115200  # serial links; a link string's @BAUD wins
    secret: str = ""  # shared with the hub: it refuses hosts that cannot prove it
    reconnects: int = 3  # tries to get a lost link back before giving up
    scan_timeout_s: float = 10.0  # Bluetooth LE: how long to look for the hub
    source: str = ""

    def geometry(self) -> dict[str, float]:
        """What the hub needs to turn millimetres and degrees into motor degrees. The keys added
        since the first hubs go only when they differ from the hub's default, so a profile that
        does not use them still suits a hub from before they existed."""
        out = {
            "wheel_diameter_mm": self.wheel_diameter_mm,
            "track_mm": self.track_mm,
            "distance_scale": self.distance_scale,
            "spin_scale": self.spin_scale,
            "pivot_scale": self.pivot_scale,
        }
        for key in ("wheel_ratio", "spin_offset_deg", "pivot_offset_deg"):
            if getattr(self, key) != DEFAULT_GEOMETRY[key]:
                out[key] = getattr(self, key)
        return out

    def action_defaults(self, action: str, params: dict[str, Any]) -> dict[str, Any]:
        """Parameters for an action with the profile's settings filled in where not given."""
        out = dict(params)
        if action == "follow_line":
            direction = out.get("direction", "forward")
            settings = self.follow.get(direction)
            if settings is not None:
                out.setdefault("sensors", list(settings.sensors))
                if len(settings.sensors) == 1:
                    out.setdefault("edge", settings.edge)
                out.setdefault("kp", settings.kp)
                out.setdefault("kd", settings.kd)
                out.setdefault("speed_pct", settings.speed_pct)
            if out.get("junctions"):
                out.setdefault("junction_left", self.junction_left)
                out.setdefault("junction_right", self.junction_right)
            out.setdefault("threshold_pct", self.threshold_pct)
        elif action == "probe_edge":
            out.setdefault("threshold_pct", self.threshold_pct)
        return out


def load_profile(path: str | Path) -> RobotProfile:
    return profile_from_table(load_toml(path))


def profile_from_table(t: Table) -> RobotProfile:
    robot_id = t.str("id")
    if not robot_id.strip():
        raise t.error("id", "must not be empty")
    # The hub refuses geometry outside these same limits.
    wheel = t.num("wheel_diameter_mm", low=GEOMETRY_LIMITS["wheel_diameter_mm"][0],
                  high=GEOMETRY_LIMITS["wheel_diameter_mm"][1])
    track = t.num("track_mm", low=GEOMETRY_LIMITS["track_mm"][0], high=GEOMETRY_LIMITS["track_mm"][1])
    scales = {k: t.num(k, 1.0, low=GEOMETRY_LIMITS[k][0], high=GEOMETRY_LIMITS[k][1])
              for k in ("distance_scale", "spin_scale", "pivot_scale", "wheel_ratio")}
    scales.update({k: t.num(k, 0.0, low=GEOMETRY_LIMITS[k][0], high=GEOMETRY_LIMITS[k][1])
                   for k in ("spin_offset_deg", "pivot_offset_deg")})
    sensors_t = t.table("sensors")
    sensors: dict[str, SensorPlace] = {}
    for name in sensors_t.data:
        s = sensors_t.table(name)
        sensors[name] = SensorPlace(s.num("forward_mm", low=-500, high=500), s.num("left_mm", low=-500, high=500))
        s.done()
    if not sensors:
        raise t.error("sensors", "at least one sensor is needed")
    if len(sensors) > 8:
        raise t.error("sensors", f"at most 8 sensors, got {len(sensors)}")

    def sensor_ref(table: Table, key: str, default: Any = ...) -> str:
        name = table.str(key) if default is ... else table.str(key, default)
        if name and name not in sensors:
            raise table.error(key, f"unknown sensor {name!r} (profile has: {', '.join(sensors)})")
        return name

    follow: dict[str, FollowSettings] = {}
    if t.has("follow"):
        follow_t = t.table("follow")
        for direction in ("forward", "backward"):
            if not follow_t.has(direction):
                continue
            f = follow_t.table(direction)
            names = f.str_list("sensors")
            if not 1 <= len(names) <= 2:
                raise f.error("sensors", f"expected one or two sensor names, got {len(names)}")
            for name in names:
                if name not in sensors:
                    raise f.error("sensors", f"unknown sensor {name!r} (profile has: {', '.join(sensors)})")
            follow[direction] = FollowSettings(
                sensors=tuple(names),
                edge=f.str("edge", "left", choices=("left", "right")),
                kp=f.num("kp", 0.6, low=0, high=100),
                kd=f.num("kd", 0.0, low=0, high=100),
                speed_pct=f.num("speed_pct", 40.0, low=0, high=100),
            )
            f.done()
        follow_t.done()
    junction_left = junction_right = ""
    threshold = 60.0
    if t.has("junctions"):
        j = t.table("junctions")
        junction_left = sensor_ref(j, "left", "")
        junction_right = sensor_ref(j, "right", "")
        threshold = j.num("threshold_pct", 60.0, low=1, high=99)
        j.done()
    link_settings: dict[str, Any] = {}
    if t.has("link"):
        link = t.table("link")
        link_settings["watchdog_ms"] = link.int("watchdog_ms", 500, low=50, high=60000)
        if link.has("baud"):
            link_settings["baud"] = link.int("baud", low=2400, high=4_000_000)
        link_settings["secret"] = link.str("secret", "")
        link_settings["reconnects"] = link.int("reconnects", 3, low=0, high=100)
        link_settings["scan_timeout_s"] = link.num("scan_timeout_s", 10.0, low=0.5, high=300)
        link.done()
    t.done()
    return RobotProfile(
        id=robot_id,
        wheel_diameter_mm=wheel,
        track_mm=track,
        sensors=sensors,
        follow=follow,
        junction_left=junction_left,
        junction_right=junction_right,
        threshold_pct=threshold,
        source=t.file,
        **link_settings,
        **scales,
    )
