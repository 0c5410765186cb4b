"""Writing an output file so that a reader never sees half of it."""

from __future__ import annotations

import os
import tempfile
from pathlib import Path


def write_atomically(path: Path, content: str | bytes) -> Path:
    """Write to a temporary file in the same folder, flush it to disk, then rename it over ``path``.

    A scraper or a mail job reading ``path`` sees the old file or the new one, never a mix; on
    any error the temporary file is removed and the old file is untouched. The folder must exist.
    """
    path = Path(path)
    data = content.encode("utf-8") if isinstance(content, str) else content
    fd, temp_name = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            os.fchmod(fh.fileno(), 0o644)  # mkstemp makes it 0600; the reader may be another user
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(temp_name, path)
    except BaseException:
        Path(temp_name).unlink(missing_ok=True)
        raise
    return path
