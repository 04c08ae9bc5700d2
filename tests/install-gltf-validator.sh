#!/bin/sh
# Installs the Khronos glTF-Validator (npm package gltf-validator) that the glTF tests run through
# node (tests/gltf_validator.py). Part of the README's test command; quick when it is already there.
# It goes into tests/.gltf-validator/ (ignored by git).
set -e
VERSION="2.0.0-dev.3.10"
HERE="$(cd "$(dirname "$0")" && pwd)"
DEST="$HERE/.gltf-validator"
PKG="$DEST/node_modules/gltf-validator/package.json"
if [ -f "$PKG" ] && grep -q "\"version\": *\"$VERSION\"" "$PKG"; then
    exit 0
fi
if ! command -v node >/dev/null 2>&1 || ! command -v npm >/dev/null 2>&1; then
    echo "tests/install-gltf-validator.sh: node and npm are needed (Node.js 18 or later)" >&2
    exit 1
fi
mkdir -p "$DEST"
[ -f "$DEST/package.json" ] || echo '{"name": "lampyr-test-gltf-validator", "private": true}' > "$DEST/package.json"
npm install --prefix "$DEST" --no-audit --no-fund --loglevel=error "gltf-validator@$VERSION"
