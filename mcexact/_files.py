"""Atomic file writes, shared by every output mcexact writes (saved runs, distributions, JSON and
HTML reports): the content goes to a temporary file in the target's folder, is flushed to disk,
and is moved over the target with :func:`os.replace`, so a reader sees the old file or the new
one, never a half-written one, even if the writer is killed. On any error the temporary file is
removed and the target is left as it was.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from pathlib import Path
from typing import IO, Iterator

__all__ = ["atomic_open", "write_text_atomic"]


@contextlib.contextmanager
def atomic_open(path: str | os.PathLike, mode: str = "wb", **kwargs) -> Iterator[IO]:
    """Open a temporary file beside `path` for writing; on leaving the block without an error it
    replaces `path`. `mode` is ``"wb"`` or ``"w"`` (then `kwargs` go to :func:`os.fdopen`, e.g.
    ``encoding``). The file gets the usual permissions (0666 less the umask)."""
    target = Path(path)
    folder = target.parent if str(target.parent) else Path(".")
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=folder)
    try:
        with os.fdopen(fd, mode, **kwargs) as fh:
            yield fh
            fh.flush()
            os.fsync(fh.fileno())
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)      # mkstemp creates 0600
        os.replace(tmp, target)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise


def write_text_atomic(path: str | os.PathLike, text: str) -> Path:
    """Write `text` as UTF-8 to `path` atomically. Returns the path."""
    with atomic_open(path, "w", encoding="utf-8", newline="\n") as fh:
        fh.write(text)
    return Path(path)
