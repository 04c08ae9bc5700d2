"""The Khronos glTF-Validator (npm package gltf-validator), run through node, for the tests.

`validate(path)` returns the validator's report as a dict (`report["issues"]["numErrors"]`,
`["messages"]` with code, message, pointer). The validator must be installed first with
`sh tests/install-gltf-validator.sh`; when it is missing this raises instead of skipping, so
a test run cannot pass without the standard's own check.
"""

from __future__ import annotations

import json
import shutil
import subprocess
from pathlib import Path

HERE = Path(__file__).resolve().parent
MODULE_DIR = HERE / ".gltf-validator"
RUNNER = HERE / "gltf_validator.js"


class ValidatorMissing(RuntimeError):
    pass


def validate(path) -> dict:
    """The validator's report (a dict) on the .glb / .gltf file at `path`."""
    node = shutil.which("node")
    if node is None:
        raise ValidatorMissing("node is not on PATH: install Node.js, then run sh tests/install-gltf-validator.sh")
    if not (MODULE_DIR / "node_modules" / "gltf-validator" / "package.json").is_file():
        raise ValidatorMissing(f"the glTF validator is not installed in {MODULE_DIR}: run "
                               f"sh tests/install-gltf-validator.sh")
    done = subprocess.run([node, str(RUNNER), str(MODULE_DIR), str(Path(path).resolve())],
                          capture_output=True, text=True, timeout=120)
    if done.returncode != 0:
        raise RuntimeError(f"the glTF validator failed on {path}: {done.stderr.strip()}")
    return json.loads(done.stdout)


def errors(report: dict) -> list[str]:
    """The report's error messages, one string each ("CODE pointer: message")."""
    return [f"{m['code']} {m.get('pointer', '')}: {m['message']}"
            for m in report["issues"]["messages"] if m["severity"] == 0]


def assert_valid(path) -> dict:
    """Validate `path` and fail the calling test with the messages when there is any error."""
    report = validate(path)
    found = errors(report)
    assert report["issues"]["numErrors"] == 0 and not found, f"glTF validator on {path}:\n" + "\n".join(found)
    return report
