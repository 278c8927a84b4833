"""Board adapters for real hubs, and the one helper every adapter shares: LinkDelegate.

A link object (hub_side.usb_serial.UsbSerialLink, hub_side.ble_uart.BleUartLink, or a team's own)
has read() -> bytes (never blocks, b"" when nothing arrived), write(data) and close(). An adapter
that mixes in LinkDelegate and sets self.link gets the Board's link methods from it, so the same
adapter serves over USB or Bluetooth LE by swapping one object.
"""


class LinkDelegate:
    """Mixin: the Board's link_read / link_write / link_room answered by self.link."""

    link = None

    def link_read(self):
        return self.link.read()

    def link_write(self, data):
        self.link.write(data)

    def link_room(self):
        # A link that cannot tell how much it can take without blocking says "plenty"; the
        # listener then never drops telemetry on its account.
        room = getattr(self.link, "room", None)
        return room() if room is not None else 1 << 20
