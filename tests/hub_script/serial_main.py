# The hub program for the serial test: the unchanged listener on the scripted board, talking over
# hub_side.usb_serial (stdin/stdout) under the MicroPython WebAssembly interpreter, with the
# scripted board's clock following the wall clock.
import asyncio
import time

from hub_side.listener import Listener
from hub_side.usb_serial import UsbSerialLink
from hub_script.scripted_board import ScriptedBoard


class SerialScriptedBoard(ScriptedBoard):
    def __init__(self, link):
        ScriptedBoard.__init__(self)
        self.link = link

    def link_read(self):
        return self.link.read()

    def link_write(self, data):
        self.link.write(data)


async def main():
    board = SerialScriptedBoard(UsbSerialLink())
    hub = Listener(board, robot_id="wasm-hub", control_period_us=10000)
    last = time.ticks_ms()
    while True:
        hub.tick()
        await asyncio.sleep_ms(1)
        now = time.ticks_ms()
        board.idle_us(time.ticks_diff(now, last) * 1000)
        last = now

# The bridge (tests/micropython/serial_bridge.mjs) awaits main(); on a board: asyncio.run(main()).
