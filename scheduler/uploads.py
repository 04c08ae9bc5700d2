"""Submitting a shot that arrives as an upload: a shot file plus an archive of its assets.

The archive (.zip, .tar.gz / .tgz, or .tar) is unpacked with the same name checks as a scene's
files (`transfer.safe_name`) and its own size and member limits: regular files only, no absolute
names, no `..`, nothing written before every member passed. The shot file lands in the unpacked
folder — or in the archive's one top folder, when the archive holds one and the shot's assets
resolve there — and is then submitted as `lampyr submit` would (`submit.submit_request`, which
sends the files Redis lacks). The upload folder is removed afterwards: the files in Redis are
what the head uses.
"""

from __future__ import annotations

import errno
import io
import re
import secrets
import shutil
import tarfile
import zipfile
import zlib
from pathlib import Path, PurePosixPath

from .transfer import TransferError, safe_name

MAX_BYTES = 2 * 1024**3  # an archive's unpacked size (rule of thumb: 4× the 512 MiB upload limit)
MAX_MEMBERS = 10_000

ARCHIVES = (".zip", ".tar.gz", ".tgz", ".tar")
# the shot's key that `Shot.with_overrides` sets → the form field that gave it
OVERRIDE_FIELDS = {"frames": "frames", "sampling.samples": "samples", "image.width": "width",
                   "image.height": "height"}
MAX_SHOT_BYTES = 16 * 1024**2  # a shot file is text (rule of thumb: far above a long animation)
_SHOT_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9 _.-]{0,80}\.toml")


class UploadError(TransferError):
    """An uploaded shot or asset archive that is refused (one line naming the field)."""


def archive_kind(filename: str) -> str:
    low = filename.lower()
    for ext in ARCHIVES:
        if low.endswith(ext):
            return ext
    raise UploadError(f"assets: expected a .zip, .tar.gz, .tgz or .tar archive, got {filename!r}")


CHUNK = 1024 * 1024


def _member_name(name: str, folder: bool = False) -> PurePosixPath | None:
    """The checked name of a member; None for the archive's own top ("./" of `tar -C dir .`)."""
    bare = name.rstrip("/") if folder or name.endswith("/") else name
    if bare in ("", ".") or PurePosixPath(bare).parts == ():
        if folder:
            return None
        raise UploadError(f"assets: member {name!r}: expected a file name")
    return safe_name(bare)


def _members(arc, kind: str, max_bytes: int, max_members: int) -> list:
    """Check every member before anything is written: [(path, size, member)] of the regular
    files. Refused: links and devices, names leaving the archive, a name used twice or both as
    a file and as a folder, more than `max_members` files or `max_bytes` unpacked."""
    files, folders, out, total = set(), set(), [], 0
    entries = 0
    for info in (arc.infolist() if kind == ".zip" else arc):  # a tar is read as it goes
        entries += 1
        if entries > 2 * max_members:  # folders count here: a tar's headers cost memory too
            raise UploadError(f"assets: the archive has more than {2 * max_members} entries")
        name = info.filename if kind == ".zip" else info.name
        if info.is_dir() if kind == ".zip" else info.isdir():
            path = _member_name(name, folder=True)
            if path is not None:
                folders.add(path)
            continue
        if kind == ".zip":
            mode = info.external_attr >> 16
            regular = not mode or (mode & 0o170000) in (0, 0o100000)
            size = info.file_size
        else:
            regular, size = info.isreg(), info.size
        if not regular:
            raise UploadError(f"assets: member {name!r}: only regular files are accepted "
                              "(no links or devices)")
        if len(out) >= max_members:
            raise UploadError(f"assets: the archive has more than {max_members} files")
        path = _member_name(name)
        total += size
        if total > max_bytes:
            raise UploadError(f"assets: the archive unpacks to more than {max_bytes} bytes")
        if path in files:
            raise UploadError(f"assets: member {name!r} appears twice")
        files.add(path)
        folders.update(path.parents)
        out.append((path, size, info))
    clash = files & folders
    if clash:
        raise UploadError(f"assets: member {str(min(clash))!r} is both a file and a folder")
    return out


def _zip_entries_within(fileobj, limit: int) -> None:
    """Refuse a zip whose end record announces more than `limit` entries before ZipFile reads
    its whole central directory into memory (an upload of tiny entries would take gigabytes).
    The end record's layout: PKWARE APPNOTE 4.3.16 (from memory), read by zipfile's own
    `_EndRecData`; without that private helper the check is skipped."""
    end = getattr(zipfile, "_EndRecData", None)
    if end is None:
        return
    rec = end(fileobj)
    fileobj.seek(0)
    if rec and rec[zipfile._ECD_ENTRIES_TOTAL] > limit:
        raise UploadError(f"assets: the archive has more than {limit} entries")


def unpack_archive(source, filename: str, dest: Path, max_bytes: int = MAX_BYTES,
                   max_members: int = MAX_MEMBERS) -> list[PurePosixPath]:
    """Check an archive (bytes, or a seekable binary file) and unpack its regular files under
    `dest`, streaming (never a whole member in memory); returns their names. Nothing is written
    before every member passed `_members`; a member whose contents disagree with its declared
    size is refused (what was written stays under `dest` for the caller to remove)."""
    kind = archive_kind(filename)
    fileobj = io.BytesIO(source) if isinstance(source, (bytes, bytearray)) else source
    try:
        if kind == ".zip":
            _zip_entries_within(fileobj, 2 * max_members)
            arc = zipfile.ZipFile(fileobj)
            opener = arc.open
        else:
            arc = tarfile.open(fileobj=fileobj, mode="r:gz" if kind in (".tar.gz", ".tgz") else "r:")
            opener = arc.extractfile
        with arc:
            members = _members(arc, kind, max_bytes, max_members)
            for path, size, info in members:
                target = Path(dest).joinpath(*path.parts)
                target.parent.mkdir(parents=True, exist_ok=True)
                with opener(info) as src, open(target, "wb") as out:
                    left = size + 1
                    while left > 0 and (chunk := src.read(min(CHUNK, left))):
                        out.write(chunk)
                        left -= len(chunk)
                if left != 1:
                    raise UploadError(f"assets: member {path.as_posix()!r}: size does not match")
    except UploadError:
        raise
    except TransferError as err:
        raise UploadError(f"assets: {err}") from None
    except (tarfile.TarError, zipfile.BadZipFile, EOFError, ValueError, zlib.error,
            RuntimeError, NotImplementedError) as err:  # zipfile: encrypted, unknown method
        raise UploadError(f"assets: not a readable {kind} archive ({err})") from None
    except OSError as err:
        if err.errno in (errno.ENOSPC, errno.EDQUOT, errno.EACCES, errno.EROFS):
            raise  # the head's disk, not the upload: a 500 and the head's log say so
        raise UploadError(f"assets: not a readable {kind} archive ({err})") from None
    return [path for path, _, _ in members]


def shot_file_name(filename: str) -> str:
    """The uploaded shot's file name, without any folder part; refused unless it is a plain
    `NAME.toml`."""
    base = filename.replace("\\", "/").rsplit("/", 1)[-1]
    if not _SHOT_NAME.fullmatch(base):
        raise UploadError(f"shot: expected a file named like courtyard.toml, got {filename!r}")
    return base


def submit_upload(r, uploads: Path, shot_name: str, shot_bytes: bytes, archive_name: str | None,
                  archive, overrides: dict, priority: int = 0,
                  tile_size: int | None = None, ready_by: float | None = None) -> str:
    """Unpack, validate and submit an uploaded shot; returns the job id.

    uploads: a folder the upload is unpacked under (a fresh subfolder, removed at the end);
    archive: the assets archive as bytes or a seekable binary file, or None.
    ShotError / AssetError (bad shot), UploadError (bad file or archive) on refusal."""
    from ..engine.shot import load_shot
    from ..errors import AssetError, ShotError, UsageError
    from .submit import submit_request

    name = shot_file_name(shot_name)
    try:
        shot_bytes.decode("utf-8")
    except UnicodeDecodeError:
        raise UploadError("shot: expected a TOML text file (UTF-8), got binary data") from None
    work = Path(uploads) / secrets.token_hex(8)
    try:
        work.mkdir(parents=True, exist_ok=True)
        files = unpack_archive(archive, archive_name, work) if archive is not None else []
        tops = {rel.parts[0] for rel in files}
        places = [work]
        if len(tops) == 1 and (work / next(iter(tops))).is_dir():
            places.append(work / next(iter(tops)))  # an archive of the shot's folder itself
        errors = []
        for place in places:
            path = place / name
            if path.is_dir():
                raise UploadError(f"shot: the archive has a folder named {name!r}")
            path.write_bytes(shot_bytes)
            try:
                load_shot(path)
            except ShotError as err:
                errors.append(err)
                path.unlink()
                continue
            try:
                return submit_request(r, path, overrides, None, priority, tile_size,
                                      ready_by=ready_by)
            except ShotError as err:  # the shot was fine: an override the form gave is not
                field = OVERRIDE_FIELDS.get(err.key)
                if field is None:
                    raise
                raise UsageError(f"{field}: {err.problem}") from None
        # a missing asset in one place is expected; a mistake in the shot itself says more
        err = next((e for e in errors if not isinstance(e, AssetError)), errors[0])
        err.file = name  # not the upload folder's path on the head
        for place in reversed(places):
            err.problem = err.problem.replace(str(place), "the uploaded archive")
        raise err
    finally:
        shutil.rmtree(work, ignore_errors=True)
