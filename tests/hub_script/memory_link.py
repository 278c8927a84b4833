"""A link held in memory, for driving the hub listener in tests: the test appends what the host
sends to `rx` and reads what the hub wrote from `tx`."""


class MemoryLink:
    def __init__(self):
        self.rx = bytearray()
        self.tx = bytearray()
        self.closed = False

    def read(self):
        data = bytes(self.rx)
        self.rx = bytearray()
        return data

    def write(self, data):
        self.tx.extend(data)

    def close(self):
        self.closed = True
