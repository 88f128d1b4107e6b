"""Writing outputs without ever leaving a half-written file.

Everything the tool writes goes to a temporary file in the destination folder
and is renamed into place (``os.replace`` is atomic on POSIX and Windows), so a
failure or an interrupt leaves the previous output intact.
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

__all__ = ["atomic_write_bytes", "atomic_write_text"]


def _umask() -> int:
    # os.umask can only be read by setting it; restore at once.
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def atomic_write_bytes(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path`` atomically, creating parent folders.

    The file gets the permissions an ordinary ``open(path, "w")`` would give
    (0666 less the umask), not mkstemp's owner-only 0600.
    """
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        os.fchmod(fd, 0o666 & ~_umask())
        with os.fdopen(fd, "wb") as handle:
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        raise


def atomic_write_text(path: Path, text: str) -> None:
    """Write UTF-8 ``text`` to ``path`` atomically (newlines kept as given)."""
    atomic_write_bytes(path, text.encode("utf-8"))
