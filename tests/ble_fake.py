"""A fake Bluetooth LE radio: bleak backend classes over simulated hubs, for the link tests.

Only the backend is fake. harness.links.ble talks to bleak's own BleakClient and BleakScanner,
which hold the classes below the way they hold the platform backends (bleak 3.x,
`backend=` argument; TECH-NOTES §1). What the fake keeps from a real stack:

- Advertising: a peripheral advertises while nobody is connected (our hub is a one-central
  peripheral and re-advertises after a disconnect). Its local name rides in the advertisement and
  its service UUIDs in the scan response, so a passive scan does not see them (as hub_side.ble_uart
  lays them out). The scanner reports through BaseBleakScanner's create_or_update_device,
  is_allowed_uuid and call_detection_callbacks, as the platform scanners do.
- Connecting by address string scans for the device for up to the timeout first and raises
  BleakDeviceNotFoundError if it is not heard (the Linux backend does the same); a device object
  whose peripheral stopped advertising times out with TimeoutError.
- GATT: our service with RX (write-without-response only) and TX (notify, with its CCCD), built
  from bleak's own BleakGATTService / BleakGATTCharacteristic / BleakGATTDescriptor. RX reports
  max_write_without_response_size = MTU - 3, which starts at 20 and may grow when the simulated
  MTU exchange completes (`mtu_exchange_s` after connecting). A longer write, a write with
  response, or a write while not connected fails.
- The hub's output (a RealtimeHub running a Simulation with the real hub listener) is sent as
  notifications of at most MTU - 3 bytes, delivered on the client's event loop in order.
- The disconnected callback fires on every disconnect, asked for or not (as on the Linux backend);
  drop() simulates the peripheral going away mid-connection.

Every write and notification size is recorded, for the tests to check chunking.
"""

from __future__ import annotations

import asyncio
import threading
import time
from collections.abc import Callable
from typing import Any, ClassVar

from bleak.backends.characteristic import BleakGATTCharacteristic
from bleak.backends.client import BaseBleakClient, NotifyCallback
from bleak.backends.descriptor import BleakGATTDescriptor
from bleak.backends.device import BLEDevice
from bleak.backends.scanner import AdvertisementData, BaseBleakScanner
from bleak.backends.service import BleakGATTService, BleakGATTServiceCollection
from bleak.exc import (
    BleakBluetoothNotAvailableError,
    BleakBluetoothNotAvailableReason,
    BleakDeviceNotFoundError,
    BleakError,
    BleakGATTProtocolError,
    BleakGATTProtocolErrorCode,
)
from bleak.uuids import normalize_uuid_16

from harness.sim import Simulation
from harness.sim.realtime import RealtimeHub, add_sim_routines
from hub_side.wire import BLE_RX_UUID, BLE_SERVICE_UUID, BLE_TX_UUID

ATT_MIN_MTU = 23  # ATT's default MTU until an exchange (Bluetooth Core Specification, Vol 3 Part F)
ATT_HEADER = 3  # opcode + handle in a notification or write command
CCCD_UUID = normalize_uuid_16(0x2902)  # Client Characteristic Configuration (SIG assigned number)
BATTERY_SERVICE_UUID = normalize_uuid_16(0x180F)  # a service that is not ours, for other devices
BATTERY_LEVEL_UUID = normalize_uuid_16(0x2A19)


class FakePeripheral:
    """A device in range: advertises, accepts one central, offers a GATT table."""

    def __init__(self, radio: FakeRadio, name: str | None, address: str, *, rssi: int = -60,
                 service_uuids: tuple[str, ...] = (BATTERY_SERVICE_UUID,), mtu: int = ATT_MIN_MTU,
                 mtu_exchange_s: float = 0.0) -> None:
        self.radio = radio
        self.name = name
        self.address = address.upper()
        self.rssi = rssi
        self.service_uuids = tuple(u.lower() for u in service_uuids)
        self.mtu = mtu  # what the exchange settles on
        self.mtu_exchange_s = mtu_exchange_s
        self.powered = True
        self.central: FakeClientBackend | None = None
        self.connections = 0
        self.disconnects = 0
        self._lock = threading.Lock()

    @property
    def advertising(self) -> bool:
        return self.powered and self.central is None

    def gatt(self, client: FakeClientBackend) -> list[tuple[str, list[tuple[str, list[str]]]]]:
        """(service uuid, [(characteristic uuid, properties)]) of this device."""
        return [(BATTERY_SERVICE_UUID, [(BATTERY_LEVEL_UUID, ["read", "notify"])])]

    def accept(self, client: FakeClientBackend) -> bool:
        with self._lock:
            if not self.advertising:
                return False
            self.central = client
            self.connections += 1
            return True

    def release(self, client: FakeClientBackend) -> bool:
        with self._lock:
            if self.central is not client:
                return False
            self.central = None
            self.disconnects += 1
            return True

    def drop(self) -> None:
        """The connection breaks from the peripheral's side (out of range, reset, battery)."""
        client = self.central
        if client is not None and self.release(client):
            client.connection_lost()

    def power_off(self) -> None:
        self.powered = False
        self.drop()

    def power_on(self) -> None:
        self.powered = True

    def received(self, client: FakeClientBackend, uuid: str, data: bytes) -> None:
        """A write command on one of this device's characteristics."""


class FakeHub(FakePeripheral):
    """Our hub: the byte-pipe service in front of a simulated robot running the real listener."""

    def __init__(self, radio: FakeRadio, name: str, address: str, sim: Simulation, *, rssi: int = -55,
                 mtu: int = ATT_MIN_MTU, mtu_exchange_s: float = 0.0, baud: int | None = None) -> None:
        super().__init__(radio, name, address, rssi=rssi, service_uuids=(BLE_SERVICE_UUID,), mtu=mtu,
                         mtu_exchange_s=mtu_exchange_s)
        self.sim = sim
        add_sim_routines(sim)
        self.writes: list[tuple[float, int, int]] = []  # (time, bytes, max allowed then) per write
        self.notifications: list[int] = []  # bytes per notification sent
        self.on_write: list[Callable[[bytes], None]] = []  # called with each write's bytes
        self.dropped_at: float | None = None
        self.hub = RealtimeHub(sim, self._send, baud=baud)

    def gatt(self, client: FakeClientBackend) -> list[tuple[str, list[tuple[str, list[str]]]]]:
        return [(BLE_SERVICE_UUID, [(BLE_RX_UUID, ["write-without-response"]), (BLE_TX_UUID, ["notify"])])]

    def received(self, client: FakeClientBackend, uuid: str, data: bytes) -> None:
        if uuid != BLE_RX_UUID:
            raise BleakGATTProtocolError(BleakGATTProtocolErrorCode.WRITE_NOT_PERMITTED)
        limit = client.mtu_now - ATT_HEADER
        if len(data) > limit:
            # A write command longer than MTU - 3 cannot be sent; the stack refuses it.
            raise BleakError(f"write of {len(data)} bytes exceeds MTU - 3 = {limit}")
        self.writes.append((time.monotonic(), len(data), limit))
        self.hub.feed(data)
        for hook in self.on_write:
            hook(data)

    def drop(self) -> None:
        self.dropped_at = time.monotonic()
        super().drop()

    def _send(self, data: bytes) -> None:
        """The hub's output (hub thread): notifications to the subscribed central, if any."""
        client = self.central
        if client is None:
            return  # nobody connected: the notifications go nowhere
        size = client.mtu_now - ATT_HEADER
        for start in range(0, len(data), size):
            chunk = bytearray(data[start:start + size])
            self.notifications.append(len(chunk))
            client.notify(BLE_TX_UUID, chunk)


class FakeRadio:
    """The air: the devices in range. Hands out backend classes bound to it."""

    def __init__(self, adv_interval_s: float = 0.05) -> None:
        self.adv_interval_s = adv_interval_s
        self.devices: dict[str, FakePeripheral] = {}
        self.scan_error: BaseException | None = None  # raised by every scan start (no adapter etc.)
        self.client_backend: type[FakeClientBackend] = type("FakeClientBackend", (FakeClientBackend,),
                                                            {"radio": self})
        self.scanner_backend: type[FakeScannerBackend] = type("FakeScannerBackend", (FakeScannerBackend,),
                                                              {"radio": self})

    def add_hub(self, name: str, address: str, sim: Simulation | None = None, **kw: Any) -> FakeHub:
        hub = FakeHub(self, name, address, sim or Simulation.from_files(seed=len(self.devices) + 1), **kw)
        self.devices[hub.address] = hub
        hub.hub.start()
        return hub

    def add_device(self, name: str | None, address: str, **kw: Any) -> FakePeripheral:
        device = FakePeripheral(self, name, address, **kw)
        self.devices[device.address] = device
        return device

    def find(self, address: str) -> FakePeripheral | None:
        device = self.devices.get(address.upper())
        return device if device is not None and device.advertising else None

    def close(self) -> None:
        for device in self.devices.values():
            device.drop()
            if isinstance(device, FakeHub):
                device.hub.stop()

    def __enter__(self) -> FakeRadio:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


class FakeScannerBackend(BaseBleakScanner):
    radio: ClassVar[FakeRadio]

    def __init__(self, detection_callback: Any, service_uuids: list[str] | None, scanning_mode: str = "active",
                 **kwargs: Any) -> None:
        super().__init__(detection_callback, service_uuids)
        self._active = scanning_mode == "active"
        self._task: asyncio.Task[None] | None = None

    async def start(self) -> None:
        if self.radio.scan_error is not None:
            raise self.radio.scan_error
        self.seen_devices = {}
        self._task = asyncio.create_task(self._listen())

    async def stop(self) -> None:
        task, self._task = self._task, None
        if task is not None:
            task.cancel()
            try:
                await task
            except asyncio.CancelledError:
                pass

    async def _listen(self) -> None:
        while True:
            for device in list(self.radio.devices.values()):
                if device.advertising:
                    self._heard(device)
            await asyncio.sleep(self.radio.adv_interval_s)

    def _heard(self, device: FakePeripheral) -> None:
        # Service UUIDs ride in the scan response, which only an active scan asks for.
        uuids = list(device.service_uuids) if self._active else []
        if not self.is_allowed_uuid(uuids):
            return
        adv = AdvertisementData(local_name=device.name, manufacturer_data={}, service_data={},
                                service_uuids=uuids, tx_power=None, rssi=device.rssi, platform_data=(device,))
        found = self.create_or_update_device(device.address, device.address, device.name,
                                             {"peripheral": device}, adv)
        self.call_detection_callbacks(found, adv)


class FakeClientBackend(BaseBleakClient):
    radio: ClassVar[FakeRadio]

    def __init__(self, address_or_ble_device: BLEDevice | str, **kwargs: Any) -> None:
        super().__init__(address_or_ble_device, **kwargs)
        self._device_given = isinstance(address_or_ble_device, BLEDevice)
        self._service_filter: set[str] | None = kwargs.get("services")
        self._peripheral: FakePeripheral | None = None
        self._loop: asyncio.AbstractEventLoop | None = None
        self._callbacks: dict[str, NotifyCallback] = {}
        self._connected = False
        self.mtu_now = ATT_MIN_MTU

    @property
    def name(self) -> str:
        peripheral = self._peripheral
        return peripheral.name if peripheral is not None and peripheral.name else self.address.replace(":", "-")

    @property
    def mtu_size(self) -> int:
        return self.mtu_now

    @property
    def is_connected(self) -> bool:
        return self._connected

    async def connect(self, pair: bool, **kwargs: Any) -> None:
        if self._connected:
            raise BleakError("Client is already connected")
        timeout = kwargs.get("timeout", self._timeout)
        deadline = time.monotonic() + timeout
        while True:
            peripheral = self.radio.find(self.address)
            if peripheral is not None and peripheral.accept(self):
                break
            if time.monotonic() >= deadline:
                if self._device_given:
                    raise asyncio.TimeoutError()
                raise BleakDeviceNotFoundError(self.address, f"Device with address {self.address} was not found.")
            await asyncio.sleep(self.radio.adv_interval_s)
        self._loop = asyncio.get_running_loop()
        self._peripheral = peripheral
        self._connected = True
        self.mtu_now = ATT_MIN_MTU
        self.services = self._build_services(peripheral)
        if peripheral.mtu > ATT_MIN_MTU:
            self._loop.call_later(peripheral.mtu_exchange_s, self._mtu_exchanged, peripheral.mtu)

    def _mtu_exchanged(self, mtu: int) -> None:
        if self._connected:
            self.mtu_now = mtu

    def _build_services(self, peripheral: FakePeripheral) -> BleakGATTServiceCollection:
        collection = BleakGATTServiceCollection()
        handle = 0
        for service_uuid, chars in peripheral.gatt(self):
            if self._service_filter is not None and service_uuid not in self._service_filter:
                continue
            handle += 1
            service = BleakGATTService(None, handle, service_uuid)
            collection.add_service(service)
            for char_uuid, properties in chars:
                handle += 2  # declaration and value
                char = BleakGATTCharacteristic(None, handle, char_uuid, list(properties),
                                               lambda: self.mtu_now - ATT_HEADER, service)
                collection.add_characteristic(char)
                if "notify" in properties or "indicate" in properties:
                    handle += 1
                    collection.add_descriptor(BleakGATTDescriptor(None, handle, CCCD_UUID, char))
        return collection

    async def disconnect(self) -> None:
        peripheral = self._peripheral
        if not self._connected or peripheral is None:
            return
        peripheral.release(self)
        self._on_disconnected()

    def connection_lost(self) -> None:
        """The peripheral is gone (any thread): the client learns it on its own loop."""
        loop = self._loop
        if loop is not None and not loop.is_closed():
            loop.call_soon_threadsafe(self._on_disconnected)

    def _on_disconnected(self) -> None:
        if not self._connected:
            return
        self._connected = False
        self.services = None
        self._callbacks.clear()
        if self._disconnected_callback is not None:
            self._disconnected_callback()

    def notify(self, uuid: str, data: bytearray) -> None:
        """A notification from the peripheral (any thread), delivered on the client's loop."""
        loop = self._loop
        if loop is not None and not loop.is_closed():
            try:
                loop.call_soon_threadsafe(self._deliver, uuid, data)
            except RuntimeError:
                pass  # the loop closed meanwhile

    def _deliver(self, uuid: str, data: bytearray) -> None:
        callback = self._callbacks.get(uuid) if self._connected else None
        if callback is not None:
            callback(data)

    def _check(self) -> FakePeripheral:
        peripheral = self._peripheral
        if not self._connected or peripheral is None or peripheral.central is not self:
            raise BleakError("Not connected")
        return peripheral

    async def pair(self, *args: Any, **kwargs: Any) -> None:
        self._check()

    async def unpair(self) -> None:
        await self.disconnect()

    async def read_gatt_char(self, characteristic: BleakGATTCharacteristic, **kwargs: Any) -> bytearray:
        self._check()
        if "read" not in characteristic.properties:
            raise BleakGATTProtocolError(BleakGATTProtocolErrorCode.READ_NOT_PERMITTED)
        return bytearray(b"\x64")  # the only readable value the fake offers: a battery level of 100 %

    async def read_gatt_descriptor(self, descriptor: BleakGATTDescriptor, **kwargs: Any) -> bytearray:
        self._check()
        subscribed = descriptor.characteristic_uuid in self._callbacks
        return bytearray(b"\x01\x00" if subscribed else b"\x00\x00")

    async def write_gatt_char(self, characteristic: BleakGATTCharacteristic, data: Any, response: bool) -> None:
        peripheral = self._check()
        wanted = "write" if response else "write-without-response"
        if wanted not in characteristic.properties:
            raise BleakGATTProtocolError(BleakGATTProtocolErrorCode.WRITE_NOT_PERMITTED)
        peripheral.received(self, characteristic.uuid, bytes(data))
        await asyncio.sleep(0)  # a round trip to the stack lets the loop run

    async def write_gatt_descriptor(self, descriptor: BleakGATTDescriptor, data: Any) -> None:
        self._check()
        raise BleakGATTProtocolError(BleakGATTProtocolErrorCode.WRITE_NOT_PERMITTED)

    async def start_notify(self, characteristic: BleakGATTCharacteristic, callback: NotifyCallback,
                           **kwargs: Any) -> None:
        self._check()
        if "notify" not in characteristic.properties and "indicate" not in characteristic.properties:
            raise BleakError(f"characteristic {characteristic.uuid} does not notify")
        self._callbacks[characteristic.uuid] = callback

    async def stop_notify(self, characteristic: BleakGATTCharacteristic) -> None:
        self._check()
        self._callbacks.pop(characteristic.uuid, None)


def bluetooth_off() -> BleakBluetoothNotAvailableError:
    """What a platform scanner raises when the radio is switched off."""
    return BleakBluetoothNotAvailableError("Bluetooth is powered off", BleakBluetoothNotAvailableReason.POWERED_OFF)
