"""Files that appear whole or not at all: write beside the target, then rename into place.

Figures, scenario fragments and store exports all go through ``atomic_file``,
so an interrupted write never leaves half a file under the user's name (the
temporary file is removed) and the new file gets the usual permissions.
"""

from __future__ import annotations

import os
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import IO, Any

__all__ = ["atomic_file", "current_umask"]


def current_umask() -> int:
    """The process umask, for files made by mkstemp/mkdtemp (0600/0700); os can only read it by setting it, so it is set back at once."""
    current = os.umask(0)
    os.umask(current)
    return current


@contextmanager
def atomic_file(path: str | Path, mode: str = "w", **open_options: Any) -> Iterator[IO[Any]]:
    """An open temporary file beside ``path``; renamed onto ``path`` when the block ends without an exception.

    Examples
    --------
    >>> import tempfile
    >>> target = Path(tempfile.mkdtemp()) / "note.txt"
    >>> with atomic_file(target, encoding="utf-8") as handle:
    ...     _ = handle.write("whole")
    >>> target.read_text()
    'whole'
    """
    path = Path(path)
    handle, temporary = tempfile.mkstemp(dir=path.absolute().parent, prefix=f".{path.name}.", suffix=".part")
    try:
        with os.fdopen(handle, mode, **open_options) as stream:
            yield stream
        os.chmod(temporary, 0o666 & ~current_umask())  # mkstemp makes 0600; give the file the usual permissions
        os.replace(temporary, path)
    except BaseException:
        Path(temporary).unlink(missing_ok=True)
        raise
