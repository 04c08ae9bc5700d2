"""Scene bundles: a shot file and every file it uses, packed as one content-addressed blob.

A bundle is a gzip-compressed tar whose members are regular files only, in sorted order with
zeroed times and owners, so the same files always give the same bytes and the same sha256. The
shot's assets may sit beside it or in folders above it; members are named relative to the
deepest folder holding them all, and the manifest member `lampyr-bundle.json` names the shot.

Unpacking trusts nothing: a member that is not a regular file (links, devices), an absolute name,
a name with `..`, too many members or too many bytes (after decompression) is refused before
anything is written.
"""

from __future__ import annotations

import hashlib
import io
import json
import os
import tarfile
from pathlib import Path, PurePosixPath

from ..errors import LampyrError

MANIFEST = "lampyr-bundle.json"
MAX_BYTES = 2 * 1024**3  # unpacked size limit (rule of thumb: far above any shot we render)
MAX_MEMBERS = 10_000


class BundleError(LampyrError):
    """A scene bundle that cannot be made or that is refused when unpacked."""

    exit_code = 2


def pack(shot) -> tuple[bytes, str, str]:
    """Pack `shot` (a loaded `Shot` with `path`) → (bundle bytes, sha256 hex, shot member name)."""
    shot_path = Path(shot.path).resolve()
    root = Path(shot.root).resolve() if shot.root is not None else shot_path.parent
    files = [shot_path] + [(root / rel).resolve() for rel in shot.files()]
    base = Path(os.path.commonpath([str(p.parent) for p in files]))
    buf = io.BytesIO()
    names = sorted({p.relative_to(base).as_posix(): p for p in files}.items())
    manifest = json.dumps({"shot": shot_path.relative_to(base).as_posix()}).encode()
    # mtime=0 in the gzip header too, so equal contents give equal bytes
    import gzip

    with gzip.GzipFile(fileobj=buf, mode="wb", mtime=0) as gz:
        with tarfile.open(fileobj=gz, mode="w", format=tarfile.PAX_FORMAT) as tar:
            _add(tar, MANIFEST, manifest)
            for name, path in names:
                _add(tar, name, path.read_bytes())
    data = buf.getvalue()
    return data, hashlib.sha256(data).hexdigest(), shot_path.relative_to(base).as_posix()


def _add(tar: tarfile.TarFile, name: str, data: bytes) -> None:
    info = tarfile.TarInfo(name)
    info.size = len(data)
    info.mode = 0o644
    info.mtime = 0
    tar.addfile(info, io.BytesIO(data))


def _safe_name(name: str) -> PurePosixPath:
    path = PurePosixPath(name)
    if not name or path.is_absolute() or name.startswith("\\") or ":" in path.parts[0]:
        raise BundleError(f"bundle member {name!r}: absolute paths are refused")
    if any(part in ("..", "") for part in path.parts) or "\\" in name:
        raise BundleError(f"bundle member {name!r}: paths leaving the bundle are refused")
    return path


def unpack(data: bytes, dest: Path, sha: str | None = None, max_bytes: int = MAX_BYTES,
           max_members: int = MAX_MEMBERS) -> str:
    """Check and unpack bundle bytes into `dest` (created; must not exist); returns the shot's
    member name. `sha`, when given, must match the bytes."""
    if sha is not None and hashlib.sha256(data).hexdigest() != sha:
        raise BundleError(f"bundle {sha[:12]}: contents do not match its hash")
    dest = Path(dest)
    files: dict[PurePosixPath, bytes] = {}
    total = 0
    try:
        with tarfile.open(fileobj=io.BytesIO(data), mode="r:gz") as tar:
            for info in tar:  # streaming: sizes are checked before each member is read
                if len(files) >= max_members:
                    raise BundleError(f"bundle has more than {max_members} files")
                name = _safe_name(info.name)
                if not info.isreg():
                    raise BundleError(f"bundle member {info.name!r}: only regular files are "
                                      "accepted (no links, folders or devices)")
                total += info.size
                if total > max_bytes:
                    raise BundleError(f"bundle unpacks to more than {max_bytes} bytes")
                body = tar.extractfile(info).read(info.size + 1)
                if len(body) != info.size:
                    raise BundleError(f"bundle member {info.name!r}: size does not match")
                if name in files:
                    raise BundleError(f"bundle member {info.name!r} appears twice")
                files[name] = body
    except (tarfile.TarError, OSError, EOFError) as err:
        raise BundleError(f"bundle is not a readable gzip tar: {err}") from None
    raw = files.pop(PurePosixPath(MANIFEST), None)
    if raw is None:
        raise BundleError(f"bundle has no {MANIFEST}")
    shot = str(_safe_name(json.loads(raw)["shot"]))
    if PurePosixPath(shot) not in files:
        raise BundleError(f"bundle names shot {shot!r} but does not hold it")
    tmp = dest.with_name(dest.name + f".part{os.getpid()}")
    for name, body in files.items():
        target = tmp.joinpath(*name.parts)
        target.parent.mkdir(parents=True, exist_ok=True)
        target.write_bytes(body)
    try:
        os.replace(tmp, dest)
    except OSError:  # another process unpacked the same bundle first: theirs is identical
        import shutil

        shutil.rmtree(tmp, ignore_errors=True)
        if not dest.exists():
            raise
    return shot
