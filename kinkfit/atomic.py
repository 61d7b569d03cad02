"""Atomic file writes: the one home of "temporary file + rename".

Every product kinkfit writes goes through :func:`atomic_path`: the content is
written to a temporary file in the target's own folder (so the final
``os.replace`` is atomic on one filesystem) and renamed onto the final name
only when complete; on any error the temporary file is removed and an earlier
file of the same name is left untouched.
"""

from __future__ import annotations

import contextlib
import json
import os
import tempfile
from pathlib import Path

__all__ = ["atomic_path", "write_json_atomic"]


@contextlib.contextmanager
def atomic_path(path, *, suffix: str = ".tmp"):
    """Yield a temporary path beside ``path``; rename it onto ``path`` on success.

    Parameters
    ----------
    path : path-like
        Final file name (its folder must exist).
    suffix : str
        Suffix of the temporary file (some writers infer a format from it).

    Examples
    --------
    >>> with atomic_path(target) as tmp:   # doctest: +SKIP
    ...     fig.savefig(tmp)
    """
    path = Path(path)
    folder = path.parent if str(path.parent) else Path(".")
    fd, tmp = tempfile.mkstemp(dir=folder, prefix=f".{path.name}.", suffix=suffix)
    os.close(fd)
    try:
        yield tmp
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise


def write_json_atomic(path, obj) -> None:
    """Write ``obj`` as JSON to ``path`` atomically (fsync'd before the rename)."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    with atomic_path(path, suffix=".json") as tmp:
        with open(tmp, "w", encoding="utf-8") as fh:
            json.dump(obj, fh, indent=1, sort_keys=True)
            fh.flush()
            os.fsync(fh.fileno())
