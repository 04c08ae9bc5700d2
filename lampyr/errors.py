"""Every error lampyr reports to a person, in one hierarchy.

Each error renders as one line that names what was wrong and what is expected; the command line
(and, later, the HTTP layer) catches `LampyrError` once and prints `str(err)`, with exit status
`err.exit_code`. Nothing below the boundary prints or exits.
"""

from __future__ import annotations


class LampyrError(Exception):
    """Base of every error meant for a person rather than a traceback."""

    exit_code = 1


class UsageError(LampyrError):
    """A bad command-line option or argument."""

    exit_code = 2


class ShotError(LampyrError):
    """A shot file that cannot be rendered as written.

    `key` is the dotted path of the offending value (`camera.fov`, `object[lantern].mesh`),
    `problem` says what is expected and what was found.
    """

    exit_code = 2

    def __init__(self, key: str, problem: str, file: str | None = None):
        self.key = key
        self.problem = problem
        self.file = file
        super().__init__(f"{key}: {problem}" if key else problem)

    def __str__(self) -> str:
        text = f"{self.key}: {self.problem}" if self.key else self.problem
        return f"{self.file}: {text}" if self.file else text


class AssetError(ShotError):
    """A file a shot refers to (mesh, environment map) is missing, unreadable or unusable."""


class FrameFileError(LampyrError):
    """A frame EXR that lampyr cannot read back as an accumulation state."""

    exit_code = 2


class RenderFailed(LampyrError):
    """`lampyr render` could not finish: a batch failed for good, or its local worker stopped.
    The frames written before stay on disk."""

    exit_code = 1
