"""Scene bundles: the same files give the same hash; bundles that try to escape are refused."""

from __future__ import annotations

import gzip
import hashlib
import io
import tarfile

import pytest

from lampyr.engine.shot import load_shot
from lampyr.scheduler.bundle import BundleError, pack, unpack

MESH = "v 0 0 0\nv 1 0 0\nv 0 1 0\nf 1 2 3\n"


@pytest.fixture
def shot_with_mesh(tiny_shot):
    (tiny_shot.parent / "assets").mkdir()
    (tiny_shot.parent / "assets" / "tri.obj").write_text(MESH)
    text = tiny_shot.read_text() + '\n[[object]]\nname = "tri"\nmaterial = "white"\nmesh = "assets/tri.obj"\n'
    tiny_shot.write_text(text)
    return tiny_shot


def test_pack_holds_the_shot_and_its_assets(shot_with_mesh, tmp_path):
    data, sha, member = pack(load_shot(shot_with_mesh))
    # sha256 of the bytes is the bundle's name (content addressing; FIPS 180-4 via hashlib)
    assert sha == hashlib.sha256(data).hexdigest()
    shot = unpack(data, tmp_path / "out", sha=sha)
    assert shot == member == "tiny.toml"
    assert (tmp_path / "out" / "assets" / "tri.obj").read_text() == MESH
    assert load_shot(tmp_path / "out" / shot).name == "tiny"


def test_the_same_files_give_the_same_bundle(shot_with_mesh):
    assert pack(load_shot(shot_with_mesh))[1] == pack(load_shot(shot_with_mesh))[1]


def _bundle(members) -> bytes:
    """A gzip tar with the given TarInfo/bytes pairs plus a manifest naming `s.toml`."""
    buf = io.BytesIO()
    with gzip.GzipFile(fileobj=buf, mode="wb") as gz, tarfile.open(fileobj=gz, mode="w") as tar:
        for info, body in [(_reg("lampyr-bundle.json", b'{"shot": "s.toml"}'), b'{"shot": "s.toml"}'),
                           (_reg("s.toml", b"x"), b"x")] + members:
            tar.addfile(info, io.BytesIO(body) if body is not None else None)
    return buf.getvalue()


def _reg(name, body):
    info = tarfile.TarInfo(name)
    info.size = len(body)
    return info


def _link(name, target, kind):
    info = tarfile.TarInfo(name)
    info.type = kind
    info.linkname = target
    return info


@pytest.mark.parametrize("member, body, message", [
    (_reg("../evil.txt", b"x"), b"x", "leaving the bundle"),
    (_reg("assets/../../evil.txt", b"x"), b"x", "leaving the bundle"),
    (_reg("/etc/evil.txt", b"x"), b"x", "absolute"),
    (_link("assets/sky.exr", "/etc/passwd", tarfile.SYMTYPE), None, "regular files"),
    (_link("assets/sky.exr", "s.toml", tarfile.LNKTYPE), None, "regular files"),
    (_link("assets/dev", "", tarfile.CHRTYPE), None, "regular files"),
])
def test_escaping_members_are_refused(tmp_path, member, body, message):
    with pytest.raises(BundleError, match=message):
        unpack(_bundle([(member, body)]), tmp_path / "out")
    assert not (tmp_path / "out").exists()
    assert not (tmp_path / "evil.txt").exists()


def test_a_bundle_that_unpacks_too_large_is_refused(tmp_path):
    # 64 MiB of zeros compresses to ~64 KiB: the limit applies to the unpacked size
    big = b"\0" * (64 << 20)
    data = _bundle([(_reg("assets/big.bin", big), big)])
    assert len(data) < 1 << 20
    with pytest.raises(BundleError, match="more than"):
        unpack(data, tmp_path / "out", max_bytes=16 << 20)
    assert not (tmp_path / "out").exists()


def test_a_bundle_whose_bytes_do_not_match_its_hash_is_refused(shot_with_mesh, tmp_path):
    data, sha, _ = pack(load_shot(shot_with_mesh))
    with pytest.raises(BundleError, match="do not match"):
        unpack(data[:-1] + bytes([data[-1] ^ 1]), tmp_path / "out", sha=sha)
