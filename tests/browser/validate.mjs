// Validate glTF files with the Khronos glTF Validator (npm package gltf-validator).
// Usage: node validate.mjs FILE...   Prints one JSON array: per file the issue counts and messages.
import { readFile } from 'node:fs/promises';
import path from 'node:path';
import { createRequire } from 'node:module';

const require = createRequire(import.meta.url);
const validator = require('gltf-validator');

const results = [];
for (const file of process.argv.slice(2)) {
  const data = new Uint8Array(await readFile(file));
  const dir = path.dirname(file);
  const report = await validator.validateBytes(data, {
    uri: path.basename(file),
    maxIssues: 100,
    externalResourceFunction: (uri) =>
      readFile(path.resolve(dir, decodeURIComponent(uri))).then((b) => new Uint8Array(b)),
  });
  results.push({
    file,
    numErrors: report.issues.numErrors,
    numWarnings: report.issues.numWarnings,
    numInfos: report.issues.numInfos,
    messages: report.issues.messages.map((m) => ({ code: m.code, severity: m.severity, pointer: m.pointer, message: m.message })),
    extensionsUsed: report.info ? report.info.extensionsUsed : undefined,
  });
}
process.stdout.write(JSON.stringify(results) + '\n');
