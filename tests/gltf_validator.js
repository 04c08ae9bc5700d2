// Runs the Khronos glTF-Validator on one .glb or .gltf file and prints its report as JSON.
// Usage: node tests/gltf_validator.js MODULE_DIR FILE
// MODULE_DIR is the folder holding node_modules/gltf-validator (tests/.gltf-validator).
// External resources (buffers, images) are read relative to FILE's folder.
const fs = require('fs');
const path = require('path');

const validator = require(path.join(process.argv[2], 'node_modules', 'gltf-validator'));
const file = process.argv[3];
const folder = path.dirname(file);

validator.validateBytes(new Uint8Array(fs.readFileSync(file)), {
    uri: path.basename(file),
    maxIssues: 200,
    externalResourceFunction: (uri) => new Promise((resolve, reject) => {
        fs.readFile(path.join(folder, decodeURIComponent(uri)), (err, data) => {
            if (err) { reject(err.toString()); } else { resolve(new Uint8Array(data)); }
        });
    }),
}).then((report) => {
    process.stdout.write(JSON.stringify(report));
}, (err) => {
    process.stderr.write(String(err) + '\n');
    process.exit(3);
});
