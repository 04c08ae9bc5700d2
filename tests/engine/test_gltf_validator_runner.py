"""The test helper that runs the Khronos glTF-Validator (tests/gltf_validator.py) must fail loudly,
never skip, when the validator is not installed, and must find errors in a broken file."""

from __future__ import annotations

import pytest

from examples.gltf_builder import GltfBuilder
from tests import gltf_validator


def test_missing_validator_raises_and_names_the_install_script(tmp_path, monkeypatch):
    path = GltfBuilder().save(tmp_path / "empty.glb")
    monkeypatch.setattr(gltf_validator, "MODULE_DIR", tmp_path / "nowhere")
    with pytest.raises(gltf_validator.ValidatorMissing, match="tests/install-gltf-validator.sh"):
        gltf_validator.validate(path)


def test_validator_reports_a_broken_file(tmp_path):
    b = GltfBuilder()
    b.add_node("n", mesh=7)  # no meshes at all: an unresolved reference
    report = gltf_validator.validate(b.save(tmp_path / "broken.gltf"))
    assert report["issues"]["numErrors"] >= 1
    assert "/nodes/0/mesh" in [m["pointer"] for m in report["issues"]["messages"]]


def test_validator_accepts_a_minimal_file(tmp_path):
    b = GltfBuilder()
    b.add_node("n")
    assert gltf_validator.assert_valid(b.save(tmp_path / "ok.glb"))["issues"]["numErrors"] == 0
