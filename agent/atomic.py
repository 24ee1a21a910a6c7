"""Replacing a small state file so that a power cut leaves the old or the new one.

- :func:`write_text_atomic(path, text)`: temporary file in the same folder,
  flushed and fsynced, renamed over the target, the folder fsynced.
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

__all__ = ["write_text_atomic"]


def write_text_atomic(path, text):
    """Write ``text`` to ``path`` atomically and durably.

    Parameters
    ----------
    path : str or Path
        The file to replace; its folder is created if missing.
    text : str
        The whole new content (UTF-8).

    Raises
    ------
    OSError
        Left to the caller, which turns it into its own error; no temporary
        file is left behind.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    dir_fd = os.open(path.parent, os.O_RDONLY)
    try:
        os.fsync(dir_fd)
    finally:
        os.close(dir_fd)
    return path
