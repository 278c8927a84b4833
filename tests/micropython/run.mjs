// Run a Python script under MicroPython (WebAssembly) so tests exercise the
// same interpreter family as the hub, not CPython.
//
// Usage: node tests/micropython/run.mjs [--pkg HOSTDIR]... SCRIPT.py
//
// Each --pkg HOSTDIR is copied to /lib/<basename of HOSTDIR>/ (MicroPython
// searches /lib), so `import <pkg>.<module>` works. SCRIPT.py runs as __main__.
// Exit codes: 0 ok, 1 Python exception, 2 bad usage or missing npm package.

import fs from "node:fs";

import { copyPackage, fail, parseArgs } from "./common.mjs";

const USAGE = "usage: node run.mjs [--pkg HOSTDIR]... SCRIPT.py";
const HEAP_BYTES = 64 * 1024 * 1024; // generous so tests are never memory-bound

const { packages, script } = parseArgs(process.argv.slice(2), USAGE);
let source;
try {
  source = fs.readFileSync(script, "utf8");
} catch (err) {
  fail(`cannot read ${script}: ${err.message}`, 2);
}

let loadMicroPython;
try {
  ({ loadMicroPython } = await import("@micropython/micropython-webassembly-pyscript"));
} catch (err) {
  fail(`MicroPython package not installed (${err.message}).\nRun: npm ci --prefix tests/micropython`, 2);
}

// linebuffer:false hands over single bytes; collecting them keeps output
// byte-exact (no decoding, no lost partial last line).
const stdoutBytes = [];
const stderrBytes = [];
const mp = await loadMicroPython({
  heapsize: HEAP_BYTES,
  linebuffer: false,
  stdout: (b) => stdoutBytes.push(...b),
  stderr: (b) => stderrBytes.push(...b),
});

let exitCode = 0;
let errorText = "";
try {
  for (const dir of packages) copyPackage(mp.FS, dir);
  mp.runPython(source);
} catch (err) {
  if (err.name === "PythonError" && err.type === "SystemExit") {
    // sys.exit() and sys.exit(0) are a normal end of the script; other values fail.
    const value = err.message.trim().split("\n").pop().replace(/^SystemExit:\s*/, "");
    exitCode = ["", "0", "None"].includes(value) ? 0 : 1;
    if (exitCode !== 0) errorText = err.message;
  } else {
    exitCode = 1;
    errorText = err.name === "PythonError" ? err.message : String(err.stack ?? err);
  }
}

process.stderr.write(Buffer.from(stderrBytes));
if (errorText) process.stderr.write(errorText.endsWith("\n") ? errorText : errorText + "\n");
// Exit only once stdout has been handed to the OS, so piped output is complete.
process.stdout.write(Buffer.from(stdoutBytes), () => process.exit(exitCode));
