// What the Node scripts here share: usage errors, the --pkg/SCRIPT arguments, and copying host
// packages into MicroPython's /lib.

import fs from "node:fs";
import path from "node:path";

export function fail(message, code) {
  process.stderr.write(message + "\n");
  process.exit(code);
}

export function parseArgs(argv, usage) {
  const packages = [];
  let script = null;
  for (let i = 0; i < argv.length; i++) {
    if (argv[i] === "--pkg" && i + 1 < argv.length) {
      packages.push(argv[++i]);
    } else if (script === null && !argv[i].startsWith("--")) {
      script = argv[i];
    } else {
      fail(`unexpected argument: ${argv[i]}\n${usage}`, 2);
    }
  }
  if (script === null) fail(usage, 2);
  return { packages, script };
}

// Copies every *.py under hostDir into /lib/<basename>/, keeping sub-folders.
export function copyPackage(FS, hostDir) {
  const root = path.resolve(hostDir);
  if (!fs.statSync(root, { throwIfNoEntry: false })?.isDirectory()) {
    fail(`--pkg ${hostDir}: not a directory`, 2);
  }
  const target = "/lib/" + path.basename(root);
  FS.mkdirTree(target);
  for (const rel of fs.readdirSync(root, { recursive: true })) {
    const hostFile = path.join(root, rel);
    if (!rel.endsWith(".py") || !fs.statSync(hostFile).isFile()) continue;
    const mpFile = target + "/" + rel.split(path.sep).join("/");
    FS.mkdirTree(path.posix.dirname(mpFile));
    FS.writeFile(mpFile, fs.readFileSync(hostFile));
  }
}

