// Run the Khronos glTF validator on one .glb/.gltf file; print its JSON report on stdout.
// Usage: node tests/tools/validate_gltf.js FILE   (needs `npm install` in the repo root)
'use strict';
const fs = require('fs');
const path = require('path');
const validator = require(path.join(__dirname, '..', '..', 'node_modules', 'gltf-validator'));

const file = process.argv[2];
if (!file) {
  console.error('usage: validate_gltf.js FILE');
  process.exit(2);
}
const data = new Uint8Array(fs.readFileSync(file));
validator.validateBytes(data, {
  uri: path.basename(file),
  maxIssues: 0,                     // 0 = report every issue
  externalResourceFunction: (uri) => new Promise((resolve, reject) => {
    fs.readFile(path.resolve(path.dirname(file), decodeURIComponent(uri)),
                (err, buf) => (err ? reject(err.toString()) : resolve(new Uint8Array(buf))));
  }),
}).then((report) => {
  process.stdout.write(JSON.stringify(report) + '\n');
}, (err) => {
  console.error(String(err));
  process.exit(1);
});
