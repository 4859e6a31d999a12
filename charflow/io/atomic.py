"""Writing a file whole or not at all: a temporary file beside it, then a rename."""

from __future__ import annotations

import contextlib
import os
import tempfile
from pathlib import Path

from charflow.records.errors import OutputError

OUTPUT_MODE = 0o644  # what an ordinary file gets; mkstemp makes it private


def write_atomic(path: Path, text: str | bytes) -> None:
    """Write to a temporary file beside ``path`` and rename it: never a half-written output."""
    binary = isinstance(text, bytes)
    tmp = None
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
        with os.fdopen(fd, "wb" if binary else "w", encoding=None if binary else "utf-8") as fh:
            fh.write(text)
            fh.flush()
            # A full disk may only show when the data goes out: find it before the rename.
            os.fsync(fh.fileno())
        # mkstemp makes the file private; outputs are ordinary files.
        os.chmod(tmp, OUTPUT_MODE)
        os.replace(tmp, path)
    except OSError as exc:
        if tmp is not None:
            with contextlib.suppress(OSError):
                os.unlink(tmp)
        kept = "; the previous version is kept" if path.exists() else ""
        raise OutputError(f"cannot write output: {exc.strerror or exc}{kept}", file=path) from exc
