// A MicroPython REPL on stdin/stdout, for tests that talk to "a board" over a pseudo-terminal.
//
// Usage: node repl_bridge.mjs      (stdin and stdout: the master side of a pty)
//
// Every byte from stdin goes to MicroPython's REPL (friendly and raw modes, as on a board's USB
// serial port); everything it prints goes to stdout unchanged. A soft reset (Ctrl-D in the REPL)
// is answered like a board: "MPY: soft reboot" and a fresh prompt. Unlike a board the heap is not
// cleared on soft reset and main.py is not run. The filesystem lives in memory for the life of
// this process. A line "bridge ready" on stderr means the REPL is listening.

let loadMicroPython;
try {
  ({ loadMicroPython } = await import("@micropython/micropython-webassembly-pyscript"));
} catch (err) {
  process.stderr.write(`MicroPython package not installed (${err.message}).\n`);
  process.exit(2);
}

const mp = await loadMicroPython({
  heapsize: 8 * 1024 * 1024,
  linebuffer: false,
  stdout: (bytes) => process.stdout.write(Buffer.from(bytes)),
});
mp.FS.mkdirTree("/lib");

mp.replInit();
process.stdin.on("data", (data) => {
  for (const byte of data) {
    if (mp.replProcessChar(byte) !== 0) {
      // The REPL asked for a soft reset (Ctrl-D); restart it in the mode it was in.
      process.stdout.write("MPY: soft reboot\r\n");
      mp.replInit();
    }
  }
});
process.stdin.on("end", () => process.exit(0));
process.stderr.write("bridge ready\n");
