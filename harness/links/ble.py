"""Bluetooth LE links: our byte-pipe service on the hub, through bleak's asyncio API.

The hub is a peripheral offering one service (hub_side.wire.BLE_SERVICE_UUID) with two
characteristics: the host writes frames, without response, to RX, and the hub sends its output as
notifications on TX. BleLink gives that the synchronous Link interface:

- bleak runs on an event loop in a background thread of the link's own; calls cross over with
  asyncio.run_coroutine_threadsafe.
- Notifications land in a buffer; read() hands over everything there as soon as anything is.
- write() splits data into pieces no longer than RX's write-without-response size, read again
  for every piece: it may be 20 just after connecting and grow once the MTU exchange is done.
- The disconnected callback marks the link lost; the next read or write raises LinkError.

How the hub is found (the target of `--link ble:TARGET`):

    ble:kestrel-7               the advertised local name (the hub advertises its robot id)
    ble:AA:BB:CC:DD:EE:FF       the address (or the UUID that systems hiding addresses give instead)
    ble:auto                    the one hub in range advertising our service (or: the service UUID)

Every bleak call takes a backend class, so the tests run the real BleakClient and BleakScanner
front-ends over a fake radio (tests/ble_fake.py).
"""

from __future__ import annotations

import asyncio
import concurrent.futures
import re
import threading
from collections.abc import Coroutine
from dataclasses import dataclass
from typing import Any, TypeVar

from bleak import BleakClient, BleakScanner
from bleak.backends.characteristic import BleakGATTCharacteristic
from bleak.backends.client import BaseBleakClient
from bleak.backends.device import BLEDevice
from bleak.backends.scanner import AdvertisementData, BaseBleakScanner
from bleak.backends.service import BleakGATTServiceCollection
from bleak.exc import (
    BleakBluetoothNotAvailableError,
    BleakBluetoothNotAvailableReason,
    BleakDBusError,
    BleakDeviceNotFoundError,
    BleakError,
)

from harness.errors import LinkError
from harness.links.base import Link
from hub_side.wire import BLE_RX_UUID, BLE_SERVICE_UUID, BLE_TX_UUID

DEFAULT_SCAN_TIMEOUT_S = 10.0
DEFAULT_CONNECT_TIMEOUT_S = 20.0
AUTO_TARGETS = ("auto", BLE_SERVICE_UUID)
AUTO_SETTLE_S = 1.0  # `ble:auto`: after the first hub is heard, listen this long for a second one
WRITE_TIMEOUT_S = 5.0  # a write without response is queued locally; this long means the stack is stuck
CLOSE_TIMEOUT_S = 5.0
MIN_WRITE_BYTES = 20  # ATT's minimum MTU (23) less the 3-byte header: always allowed

_MAC = re.compile(r"[0-9A-Fa-f]{2}(:[0-9A-Fa-f]{2}){5}")
_UUID = re.compile(r"[0-9A-Fa-f]{8}-[0-9A-Fa-f]{4}-[0-9A-Fa-f]{4}-[0-9A-Fa-f]{4}-[0-9A-Fa-f]{12}")
_HINT_LIST = "`trackproof links --ble` lists what is in range"

T = TypeVar("T")


@dataclass(frozen=True)
class BleHub:
    """A hub heard advertising our service."""

    name: str | None
    address: str
    rssi: int | None


def is_address(target: str) -> bool:
    """True if target is a Bluetooth address or a platform device UUID (not our service UUID)."""
    if _MAC.fullmatch(target):
        return True
    return bool(_UUID.fullmatch(target)) and target.lower() != BLE_SERVICE_UUID


def advertises_service(adv: AdvertisementData) -> bool:
    return any(uuid.lower() == BLE_SERVICE_UUID for uuid in adv.service_uuids)


def scan_hubs(timeout_s: float, *, scanner_backend: type[BaseBleakScanner] | None = None) -> list[BleHub]:
    """The hubs heard advertising our service within timeout_s, strongest signal first."""

    async def scan() -> dict[str, tuple[BLEDevice, AdvertisementData]]:
        return await BleakScanner.discover(timeout=timeout_s, return_adv=True, backend=scanner_backend)

    runner = _LoopThread("ble-scan")
    try:
        found = runner.run(scan(), timeout_s + 10.0)
    except (BleakError, OSError, TimeoutError) as exc:
        raise bluetooth_error(exc, "scanning for hubs") from None
    finally:
        runner.stop()
    hubs = [BleHub(adv.local_name or device.name, device.address, adv.rssi)
            for device, adv in found.values() if advertises_service(adv)]
    return sorted(hubs, key=lambda h: (h.rssi is None, -(h.rssi or 0), h.address))


class BleLink(Link):
    """A connection to one hub's byte-pipe service; raises LinkError if it cannot be made."""

    def __init__(self, target: str, *, scan_timeout_s: float = DEFAULT_SCAN_TIMEOUT_S,
                 connect_timeout_s: float = DEFAULT_CONNECT_TIMEOUT_S,
                 client_backend: type[BaseBleakClient] | None = None,
                 scanner_backend: type[BaseBleakScanner] | None = None) -> None:
        self.target = target
        self.name = f"ble:{target}"
        self.address: str | None = None
        self.scan_timeout_s = scan_timeout_s
        self.connect_timeout_s = connect_timeout_s
        self._client_backend = client_backend
        self._scanner_backend = scanner_backend
        self._cond = threading.Condition()
        self._inbox = bytearray()
        self._lost: str | None = None  # why reads and writes now fail (lost or closed)
        self._closed = False
        self._client: BleakClient | None = None
        self._rx: BleakGATTCharacteristic | None = None
        self._runner = _LoopThread(f"ble-{target}")
        try:
            # The coroutine keeps its own timeouts; this bound only guards against a stuck stack.
            self._runner.run(self._open(), scan_timeout_s + connect_timeout_s + 10.0)
        except BaseException as exc:
            self._closed = True
            self._runner.stop()
            if isinstance(exc, (BleakError, OSError, TimeoutError)):
                raise bluetooth_error(exc, f"connecting to {target}") from None
            raise

    # ------------------------------------------------------------ Link

    def write(self, data: bytes) -> None:
        if not data:
            return
        with self._cond:
            lost = self._lost
        if lost is not None:
            raise LinkError(lost)
        try:
            self._runner.run(self._write(bytes(data)), WRITE_TIMEOUT_S)
        except TimeoutError:
            why = f"Bluetooth LE link to {self.target}: a write did not finish within {WRITE_TIMEOUT_S:g} s"
        except (BleakError, OSError) as exc:
            why = f"Bluetooth LE link to {self.target} lost while writing: {exc}"
        else:
            return
        with self._cond:
            if self._lost is None:
                self._lost = why
            raise LinkError(self._lost)

    def read(self, timeout_s: float) -> bytes:
        with self._cond:
            if not self._inbox and self._lost is None and timeout_s > 0:
                self._cond.wait_for(lambda: self._inbox or self._lost is not None, timeout_s)
            if self._inbox:
                # What arrived before a loss is still handed over; the loss shows on the next call.
                data = bytes(self._inbox)
                self._inbox.clear()
                return data
            if self._lost is not None:
                raise LinkError(self._lost)
            return b""

    def close(self) -> None:
        with self._cond:
            if self._closed:
                return
            self._closed = True
            if self._lost is None:
                self._lost = f"Bluetooth LE link to {self.target} is closed"
            self._cond.notify_all()
        client = self._client
        if client is not None:
            try:
                self._runner.run(_disconnect(client), CLOSE_TIMEOUT_S)
            except (BleakError, OSError, TimeoutError):
                pass  # the hub is gone or the stack is stuck; the loop is stopped anyway
        self._runner.stop()

    # ------------------------------------------------------------ on the event loop

    async def _open(self) -> None:
        try:
            device = await self._find()
        except (BleakError, OSError, TimeoutError) as exc:
            raise bluetooth_error(exc, f"looking for {self.target}") from None
        what = _describe(device)
        client = BleakClient(device, disconnected_callback=self._on_disconnect, services=[BLE_SERVICE_UUID],
                             timeout=self.connect_timeout_s, backend=self._client_backend)
        try:
            await client.connect()
        except BleakDeviceNotFoundError:
            raise LinkError(f"{what} was heard but then not found when connecting; is it still on? "
                            + _HINT_LIST) from None
        except TimeoutError:
            raise LinkError(f"connecting to {what} timed out after {self.connect_timeout_s:g} s; the hub may be "
                            "connected to another computer, or out of range") from None
        except (BleakError, OSError) as exc:
            raise bluetooth_error(exc, f"connecting to {what}") from None
        try:
            rx, tx = byte_pipe(client.services, what)
            await client.start_notify(tx, self._on_notify)
        except BaseException as exc:
            await _disconnect(client)
            if isinstance(exc, (BleakError, OSError)):
                raise bluetooth_error(exc, f"setting up {what}") from None
            raise
        self._client, self._rx = client, rx
        self.address = client.address

    async def _find(self) -> BLEDevice:
        target, timeout_s = self.target, self.scan_timeout_s
        if target.lower() in AUTO_TARGETS:
            return await self._find_only_hub()
        if is_address(target):
            device = await BleakScanner.find_device_by_address(target, timeout=timeout_s,
                                                               backend=self._scanner_backend)
            what = f"with address {target}"
        else:
            # The advertised local name, or the name the system remembers for the device.
            device = await BleakScanner.find_device_by_filter(
                lambda dev, adv: adv.local_name == target or dev.name == target,
                timeout=timeout_s, backend=self._scanner_backend)
            what = f"named {target!r}"
        if device is None:
            raise LinkError(f"no Bluetooth LE hub {what} advertising the trackproof service within "
                            f"{timeout_s:g} s; is it on and advertising? {_HINT_LIST}")
        return device

    async def _find_only_hub(self) -> BLEDevice:
        heard: dict[str, tuple[BLEDevice, AdvertisementData]] = {}
        first = asyncio.Event()

        def on_advert(device: BLEDevice, adv: AdvertisementData) -> None:
            if advertises_service(adv):
                heard[device.address] = (device, adv)
                first.set()

        async with BleakScanner(on_advert, backend=self._scanner_backend):
            try:
                async with asyncio.timeout(self.scan_timeout_s):
                    await first.wait()
            except TimeoutError:
                raise LinkError(f"no Bluetooth LE hub advertising the trackproof service within "
                                f"{self.scan_timeout_s:g} s; is it on and advertising? {_HINT_LIST}") from None
            # Two robots in range make any choice a guess, and the wrong one would move.
            await asyncio.sleep(min(AUTO_SETTLE_S, self.scan_timeout_s))
        if len(heard) > 1:
            names = ", ".join(_describe(d, adv) for d, adv in heard.values())
            raise LinkError(f"more than one hub advertises the trackproof service ({names}); "
                            "name one with --link ble:NAME_OR_ADDRESS")
        return next(iter(heard.values()))[0]

    async def _write(self, data: bytes) -> None:
        client, rx = self._client, self._rx
        assert client is not None and rx is not None
        view = memoryview(data)
        while view:
            size = max(MIN_WRITE_BYTES, rx.max_write_without_response_size)
            await client.write_gatt_char(rx, view[:size], response=False)
            view = view[size:]

    def _on_notify(self, _char: BleakGATTCharacteristic, data: bytearray) -> None:
        with self._cond:
            self._inbox += data
            self._cond.notify_all()

    def _on_disconnect(self, _client: BleakClient) -> None:
        # Also called when we disconnect on purpose; then the link is closed, not lost.
        with self._cond:
            if self._lost is None:
                self._lost = f"Bluetooth LE link to {self.target} lost (out of range, switched off or restarted?)"
            self._cond.notify_all()


def byte_pipe(services: BleakGATTServiceCollection, what: str) -> tuple[BleakGATTCharacteristic,
                                                                         BleakGATTCharacteristic]:
    """The RX and TX characteristics of our service; LinkError saying what is missing or wrong."""
    rx = services.get_characteristic(BLE_RX_UUID)
    tx = services.get_characteristic(BLE_TX_UUID)
    missing = [label for label, char in (("RX", rx), ("TX", tx)) if char is None]
    if rx is None or tx is None:
        raise LinkError(f"{what} does not offer the trackproof byte-pipe service (no {' or '.join(missing)} "
                        f"characteristic); is the hub program running, and is this the right device?")
    if "write-without-response" not in rx.properties:
        raise LinkError(f"{what}: the RX characteristic cannot be written without response "
                        f"(it allows: {', '.join(rx.properties) or 'nothing'}); is the hub program up to date?")
    if "notify" not in tx.properties:
        raise LinkError(f"{what}: the TX characteristic does not notify "
                        f"(it allows: {', '.join(tx.properties) or 'nothing'}); is the hub program up to date?")
    return rx, tx


_UNAVAILABLE = {
    BleakBluetoothNotAvailableReason.POWERED_OFF: "the Bluetooth radio is off; turn it on",
    BleakBluetoothNotAvailableReason.NO_BLUETOOTH: "this computer has no Bluetooth radio; plug in a Bluetooth LE adapter",
    BleakBluetoothNotAvailableReason.NO_BLE_CENTRAL_ROLE:
        "this Bluetooth radio cannot connect to LE devices; use a Bluetooth 4.0 or later adapter",
    BleakBluetoothNotAvailableReason.DENIED_BY_USER:
        "this program may not use Bluetooth; allow it (or the terminal it runs in) in the system's privacy settings",
    BleakBluetoothNotAvailableReason.DENIED_BY_SYSTEM: "the system does not allow this program to use Bluetooth",
    BleakBluetoothNotAvailableReason.DENIED_BY_UNKNOWN: "this program was denied Bluetooth access",
}


def bluetooth_error(exc: BaseException, doing: str) -> LinkError:
    """A LinkError saying what failed while `doing`, and what to do about it."""
    if isinstance(exc, LinkError):
        return exc
    if isinstance(exc, BleakBluetoothNotAvailableError):
        return LinkError(f"Bluetooth is not available ({doing}): {_UNAVAILABLE.get(exc.reason, exc.args[0])}")
    if isinstance(exc, BleakDBusError):
        if exc.dbus_error == "org.freedesktop.DBus.Error.ServiceUnknown":
            return LinkError(f"Bluetooth is not available ({doing}): BlueZ, the Linux Bluetooth service, is not "
                             "running (start the bluetooth service)")
        if exc.dbus_error == "org.bluez.Error.NotReady":
            return LinkError(f"Bluetooth is not available ({doing}): the Bluetooth adapter is off "
                             "(`bluetoothctl power on`)")
        if exc.dbus_error in ("org.freedesktop.DBus.Error.AccessDenied", "org.bluez.Error.NotPermitted"):
            return LinkError(f"Bluetooth LE ({doing}): permission denied by BlueZ ({exc}); see docs/links.md")
    if isinstance(exc, PermissionError):
        return LinkError(f"Bluetooth LE ({doing}): permission denied ({exc}); see docs/links.md")
    if isinstance(exc, (FileNotFoundError, ConnectionRefusedError)):
        # dbus-fast raises these when there is no system bus socket (TECH-NOTES §1).
        return LinkError(f"Bluetooth is not available ({doing}): no D-Bus system bus ({exc}); on Linux, "
                         "Bluetooth LE needs D-Bus and BlueZ running")
    if isinstance(exc, TimeoutError):
        return LinkError(f"Bluetooth LE: timed out {doing}")
    return LinkError(f"Bluetooth LE error {doing}: {type(exc).__name__}: {exc}")


def _describe(device: BLEDevice, adv: AdvertisementData | None = None) -> str:
    name = (adv.local_name if adv is not None else None) or device.name
    return f"{name} ({device.address})" if name and name != device.address else device.address


async def _disconnect(client: BleakClient) -> None:
    try:
        await client.disconnect()
    except (BleakError, OSError, TimeoutError):
        pass  # already gone, or the stack gave up: nothing more to release here


class _LoopThread:
    """An asyncio event loop running in a daemon thread, for bleak's coroutines."""

    def __init__(self, name: str) -> None:
        self.loop = asyncio.new_event_loop()
        self._thread = threading.Thread(target=self._main, name=name, daemon=True)
        self._thread.start()

    def _main(self) -> None:
        loop = self.loop
        asyncio.set_event_loop(loop)
        try:
            loop.run_forever()
        finally:
            # What asyncio.run does on the way out: nothing is left pending or unclosed.
            tasks = asyncio.all_tasks(loop)
            for task in tasks:
                task.cancel()
            loop.run_until_complete(asyncio.gather(*tasks, return_exceptions=True))
            loop.run_until_complete(loop.shutdown_asyncgens())
            loop.run_until_complete(loop.shutdown_default_executor())
            asyncio.set_event_loop(None)
            loop.close()

    def run(self, coro: Coroutine[Any, Any, T], timeout_s: float) -> T:
        """Run coro on the loop and wait for it; TimeoutError (coro cancelled) after timeout_s."""
        future = asyncio.run_coroutine_threadsafe(coro, self.loop)
        try:
            return future.result(timeout_s)
        except concurrent.futures.TimeoutError:
            if future.done():
                raise  # the coroutine itself timed out
            future.cancel()
            raise TimeoutError(f"no answer within {timeout_s:g} s") from None
        except BaseException:
            future.cancel()  # e.g. Ctrl-C while waiting: do not leave the coroutine running
            raise

    def stop(self) -> None:
        if self.loop.is_closed():
            return
        try:
            self.loop.call_soon_threadsafe(self.loop.stop)
        except RuntimeError:
            return  # closed meanwhile
        self._thread.join(timeout=CLOSE_TIMEOUT_S)
