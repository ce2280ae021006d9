"""Files written for people and other machines: created with the process umask (a relay running
as another user must be able to read a model or a configuration) and replaced in one step."""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

__all__ = ["apply_umask", "write_atomically"]


def apply_umask(path: Path) -> None:
    """Give ``path`` the permissions a plain ``open()`` would have (0666 less the umask);
    temporary files are created 0600 whatever the umask."""
    mask = os.umask(0)
    os.umask(mask)
    os.chmod(path, 0o666 & ~mask)


def write_atomically(path: Path, data: bytes) -> None:
    """Write to a temporary file beside ``path``, set the umask's permissions, then rename: a
    failed run leaves the old file (or none), never half of one."""
    descriptor, temporary = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".part")
    try:
        with os.fdopen(descriptor, "wb") as handle:
            handle.write(data)
        apply_umask(Path(temporary))
        os.replace(temporary, path)
    except BaseException:
        Path(temporary).unlink(missing_ok=True)
        raise
