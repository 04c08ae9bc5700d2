"""Replacing a file whole by writing over a spare beside it and exchanging the two names.

The head's tile files used to be replaced by writing a new file beside the old one and renaming
it over. Most of that write's time went to the file system, not to the bytes: blocks allocated
for the new file, the old file's freed. Measured on the machine lampyr is developed on (ext4,
491 KB a tile file, one at a time, 4 rounds of 64 files): a new file renamed over 1.0-1.3 ms
without fsync and 2.35-2.9 ms with; the same bytes written over a spare file kept from the
previous write, then the names exchanged, 0.09-0.39 ms and 0.90-1.18 ms.

`replace(path, parts, fsync)` writes the bytes over `<path>.spare` (made when missing, cut to
length), fsyncs it, then exchanges the names `<path>.spare` and `path` in one step: renameat(2)'s
`renameat2(..., RENAME_EXCHANGE)` on Linux (kernel 3.15 and later, glibc 2.28 and later; the
call's semantics as in its manual page, from memory: both names must exist, and the exchange is
atomic, so `path` names the old file or the new one whole, never a mix). The spare then holds the
old bytes and is written over the next time. Where the exchange is not there (another system, a
file system without it, an old kernel) or `path` does not exist yet, the spare is renamed over
`path` instead (`os.replace`), as files were replaced before.

A reader that opened `path` before an exchange reads the old file, which is now the spare: the
next `replace` of the same path would write over it under the reader. A caller with readers that
may be that slow drops the spare after the exchange (`drop_spare`), so the next write starts a
file of its own. The folder's own fsync, which makes the exchange durable, is the caller's.
"""

from __future__ import annotations

import ctypes
import errno
import os
import sys
from pathlib import Path

SPARE_SUFFIX = ".spare"
_AT_FDCWD = -100  # <fcntl.h> on Linux: "the current directory" for the *at calls
_RENAME_EXCHANGE = 2  # <linux/fs.h>: (1 << 1)
# the exchange cannot be made here (not this file system, not this kernel): rename instead
_UNSUPPORTED = {errno.EINVAL, errno.ENOSYS, errno.ENOTSUP, errno.EOPNOTSUPP, errno.EXDEV}


def _load_renameat2():
    """libc's renameat2, or None where there is none (not Linux, an old C library)."""
    if not sys.platform.startswith("linux"):
        return None
    try:
        fn = ctypes.CDLL(None, use_errno=True).renameat2
    except (OSError, AttributeError):
        return None
    fn.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p, ctypes.c_uint]
    fn.restype = ctypes.c_int
    return fn


_renameat2 = _load_renameat2()


def exchange_available() -> bool:
    """Whether this system has the exchange call at all (a file system may still refuse it)."""
    return _renameat2 is not None


def spare_of(path: Path) -> Path:
    return path.with_name(path.name + SPARE_SUFFIX)


def exchange(a: Path, b: Path) -> bool:
    """Swap the names `a` and `b` atomically; False (nothing changed) where the system cannot.
    Other errors (a name missing, no right to the folder) raise OSError."""
    if _renameat2 is None:
        return False
    if _renameat2(_AT_FDCWD, os.fsencode(a), _AT_FDCWD, os.fsencode(b), _RENAME_EXCHANGE) == 0:
        return True
    err = ctypes.get_errno()
    if err in _UNSUPPORTED:
        return False
    raise OSError(err, os.strerror(err), str(a), None, str(b))


def replace(path: Path, parts, fsync: bool = True, use_spare: bool = True) -> bool:
    """Make `path` hold the bytes of `parts` (buffers, written in order), old or new whole for
    any reader (see the module docstring). use_spare: False renames a new file over `path` and
    keeps no spare. True when a spare holding the old bytes is left beside `path`.
    An OSError leaves `path` as it was and no spare."""
    spare = spare_of(path)
    # O_BINARY: Windows' C library would otherwise write \n as \r\n
    flags = os.O_WRONLY | os.O_CREAT | getattr(os, "O_BINARY", 0) | (0 if use_spare else os.O_TRUNC)
    try:
        fd = os.open(spare, flags, 0o644)
        try:
            total = write_parts(fd, parts)
            if os.fstat(fd).st_size > total:  # the old bytes were longer: cut
                os.ftruncate(fd, total)
            if fsync:
                os.fsync(fd)
        finally:
            os.close(fd)
        if use_spare and path.exists() and exchange(spare, path):
            return True
        os.replace(spare, path)
    except OSError:
        drop_spare(path)
        raise
    return False


def drop_spare(path: Path) -> None:
    """Remove `path`'s spare, if there is one."""
    _unlink(spare_of(path))


def drop_spares_in(folder: Path) -> None:
    """Remove every spare in `folder` (left by a head that was killed: nothing reads them)."""
    try:
        spares = list(folder.glob("*" + SPARE_SUFFIX))
    except OSError:
        return
    for spare in spares:
        _unlink(spare)


def _unlink(spare: Path) -> None:
    try:
        spare.unlink()
    except OSError:  # a spare is never read: no error is worth raising
        pass


def write_parts(fd: int, parts) -> int:
    """Write the byte pieces in order from the file's current offset: one writev(2) where there
    is one (no joined copy), else one write at a time; a short write goes on where it stopped.
    Returns the bytes written."""
    views = [v for v in (memoryview(p).cast("B") for p in parts) if len(v)]
    total = sum(len(v) for v in views)
    if not hasattr(os, "writev"):
        for view in views:
            while view:
                view = view[os.write(fd, view):]
        return total
    while views:
        done = os.writev(fd, views[:_IOV_MAX])
        while views and done >= len(views[0]):
            done -= len(views.pop(0))
        if done:
            views[0] = views[0][done:]
    return total


def _iov_max() -> int:
    """Pieces one writev(2) takes: the system's IOV_MAX (1024 on Linux), at least POSIX's 16
    (_XOPEN_IOV_MAX) where the system does not say."""
    try:
        return max(16, os.sysconf("SC_IOV_MAX"))
    except (AttributeError, ValueError, OSError):
        return 16


_IOV_MAX = _iov_max()
