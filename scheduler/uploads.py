"""Submitting a shot that arrives as an upload: a shot file plus an archive of its assets.

The archive (.zip, .tar.gz / .tgz, or .tar) is unpacked with the same checks as a scene bundle
(`bundle._safe_name`, its size and member limits): regular files only, no absolute names, no `..`,
nothing written before every member passed. The shot file lands in the unpacked folder — or in
the archive's one top folder, when the archive holds one and the shot's assets resolve there —
and is then submitted as `lampyr submit` would (`submit.submit_request`, which packs and stores
the bundle). The upload folder is removed afterwards: the bundle in Redis is what the head uses.
"""

from __future__ import annotations

import io
import re
import secrets
import shutil
import tarfile
import zipfile
from pathlib import Path, PurePosixPath

from .bundle import MAX_BYTES, MAX_MEMBERS, BundleError, _safe_name

ARCHIVES = (".zip", ".tar.gz", ".tgz", ".tar")
_SHOT_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9 _.-]{0,80}\.toml")


class UploadError(BundleError):
    """An uploaded shot or asset archive that is refused (one line naming the field)."""


def archive_kind(filename: str) -> str:
    low = filename.lower()
    for ext in ARCHIVES:
        if low.endswith(ext):
            return ext
    raise UploadError(f"assets: expected a .zip, .tar.gz, .tgz or .tar archive, got {filename!r}")


def read_archive(data: bytes, filename: str, max_bytes: int = MAX_BYTES,
                 max_members: int = MAX_MEMBERS) -> dict[PurePosixPath, bytes]:
    """Every regular file of an archive by its checked name; folders are skipped, anything else
    (links, devices) or a name leaving the archive is refused."""
    kind = archive_kind(filename)
    files: dict[PurePosixPath, bytes] = {}
    total = 0

    def take(name: str, size: int, read) -> None:
        nonlocal total
        if len(files) >= max_members:
            raise UploadError(f"assets: the archive has more than {max_members} files")
        path = _safe_name(name.rstrip("/") if name.endswith("/") else name)
        total += size
        if total > max_bytes:
            raise UploadError(f"assets: the archive unpacks to more than {max_bytes} bytes")
        body = read()
        if len(body) != size:
            raise UploadError(f"assets: member {name!r}: size does not match")
        if path in files:
            raise UploadError(f"assets: member {name!r} appears twice")
        files[path] = body

    try:
        if kind == ".zip":
            with zipfile.ZipFile(io.BytesIO(data)) as z:
                for info in z.infolist():
                    if info.is_dir():
                        _safe_name(info.filename.rstrip("/"))
                        continue
                    mode = info.external_attr >> 16
                    if mode and (mode & 0o170000) not in (0, 0o100000):
                        raise UploadError(f"assets: member {info.filename!r}: only regular files "
                                          "are accepted (no links or devices)")
                    take(info.filename, info.file_size, lambda: z.read(info))
        else:
            mode = "r:gz" if kind in (".tar.gz", ".tgz") else "r:"
            with tarfile.open(fileobj=io.BytesIO(data), mode=mode) as tar:
                for info in tar:
                    if info.isdir():
                        _safe_name(info.name.rstrip("/"))
                        continue
                    if not info.isreg():
                        raise UploadError(f"assets: member {info.name!r}: only regular files "
                                          "are accepted (no links or devices)")
                    take(info.name, info.size, lambda: tar.extractfile(info).read(info.size + 1))
    except UploadError:
        raise
    except BundleError as err:
        raise UploadError(f"assets: {err}") from None
    except (tarfile.TarError, zipfile.BadZipFile, OSError, EOFError, ValueError) as err:
        raise UploadError(f"assets: not a readable {kind} archive ({err})") from None
    return files


def shot_file_name(filename: str) -> str:
    """The uploaded shot's file name, without any folder part; refused unless it is a plain
    `NAME.toml`."""
    base = filename.replace("\\", "/").rsplit("/", 1)[-1]
    if not _SHOT_NAME.fullmatch(base):
        raise UploadError(f"shot: expected a file named like courtyard.toml, got {filename!r}")
    return base


def submit_upload(r, uploads: Path, shot_name: str, shot_bytes: bytes, archive_name: str | None,
                  archive_bytes: bytes | None, overrides: dict, priority: int = 0,
                  tile_size: int | None = None, deadline: float | None = None) -> str:
    """Unpack, validate and submit an uploaded shot; returns the job id.

    uploads: a folder the upload is unpacked under (a fresh subfolder, removed at the end).
    ShotError / AssetError (bad shot), UploadError (bad file or archive) on refusal."""
    from ..engine.shot import load_shot
    from ..errors import AssetError, ShotError
    from .submit import submit_request

    name = shot_file_name(shot_name)
    try:
        shot_bytes.decode("utf-8")
    except UnicodeDecodeError:
        raise UploadError("shot: expected a TOML text file (UTF-8), got binary data") from None
    files = read_archive(archive_bytes, archive_name) if archive_bytes else {}
    work = Path(uploads) / secrets.token_hex(8)
    try:
        for rel, body in files.items():
            target = work.joinpath(*rel.parts)
            target.parent.mkdir(parents=True, exist_ok=True)
            target.write_bytes(body)
        work.mkdir(parents=True, exist_ok=True)
        tops = {rel.parts[0] for rel in files}
        places = [work]
        if len(tops) == 1 and (work / next(iter(tops))).is_dir():
            places.append(work / next(iter(tops)))  # an archive of the shot's folder itself
        errors = []
        for place in places:
            path = place / name
            path.write_bytes(shot_bytes)
            try:
                load_shot(path)
            except ShotError as err:
                errors.append(err)
                path.unlink()
                continue
            return submit_request(r, path, overrides, None, priority, tile_size,
                                  deadline=deadline)
        # a missing asset in one place is expected; a mistake in the shot itself says more
        err = next((e for e in errors if not isinstance(e, AssetError)), errors[0])
        err.file = name  # not the upload folder's path on the head
        for place in reversed(places):
            err.problem = err.problem.replace(str(place), "the uploaded archive")
        raise err
    finally:
        shutil.rmtree(work, ignore_errors=True)
