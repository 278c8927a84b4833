// A MicroPython program on stdin/stdout as if they were a board's USB serial port, for tests
// that talk to the real hub listener over a pseudo-terminal with the host's serial link.
//
// Usage: node serial_bridge.mjs [--pkg HOSTDIR]... SCRIPT.py
//
// Bytes from stdin are queued for MicroPython's sys.stdin (an empty queue reads as no data, the
// WebAssembly interpreter's behaviour); what the program writes to sys.stdout goes to stdout
// unchanged. SCRIPT.py defines `async def main()`, which is awaited; its loop must await
// (asyncio.sleep_ms) to let input in. The process ends when stdin closes or main() returns.

import fs from "node:fs";

import { copyPackage, fail, parseArgs } from "./common.mjs";

const USAGE = "usage: node serial_bridge.mjs [--pkg HOSTDIR]... SCRIPT.py";
const { packages, script } = parseArgs(process.argv.slice(2), USAGE);

let loadMicroPython;
try {
  ({ loadMicroPython } = await import("@micropython/micropython-webassembly-pyscript"));
} catch (err) {
  fail(`MicroPython package not installed (${err.message}).\nRun: npm ci --prefix tests/micropython`, 2);
}

const incoming = [];
let head = 0;
let outgoing = [];
function flush() {
  if (outgoing.length) {
    process.stdout.write(Buffer.from(outgoing));
    outgoing = [];
  }
}

const mp = await loadMicroPython({
  heapsize: 16 * 1024 * 1024,
  linebuffer: false,
  stdin: () => (head < incoming.length ? incoming[head++] : null),
  stdout: (bytes) => {
    outgoing.push(...bytes);
    if (outgoing.length === bytes.length) setImmediate(flush);
  },
  stderr: (bytes) => process.stderr.write(Buffer.from(bytes)),
});
for (const dir of packages) copyPackage(mp.FS, dir);

process.stdin.on("data", (data) => {
  if (head === incoming.length) {
    incoming.length = 0;
    head = 0;
  }
  for (const byte of data) incoming.push(byte);
});
process.stdin.on("end", () => {
  flush();
  process.exit(0);
});

try {
  mp.runPython(fs.readFileSync(script, "utf8"));
  await mp.runPythonAsync("await main()");
} catch (err) {
  process.stderr.write((err.name === "PythonError" ? err.message : String(err.stack ?? err)) + "\n");
  flush();
  process.exit(1);
}
flush();
process.exit(0);
