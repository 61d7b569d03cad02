"""Location and integrity of the on-disk table cache.

The cache folder is ``$KINKFIT_CACHE_DIR`` if set, else
``$XDG_CACHE_HOME/kinkfit`` or ``~/.cache/kinkfit``.  Entries are ``.npz``
files named by a SHA-256 key of every input and the package version; they
are written atomically and validated on load (a corrupt or stale entry is
rebuilt).
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import tempfile
from pathlib import Path

import numpy as np

from . import __version__

__all__ = ["cache_dir", "cache_key", "load_arrays", "save_arrays"]

log = logging.getLogger(__name__)


def cache_dir() -> Path:
    """Return the cache folder, creating it if needed."""
    env = os.environ.get("KINKFIT_CACHE_DIR")
    if env:
        path = Path(env)
    else:
        base = os.environ.get("XDG_CACHE_HOME") or (Path.home() / ".cache")
        path = Path(base) / "kinkfit"
    path.mkdir(parents=True, exist_ok=True)
    return path


def cache_key(kind: str, inputs: dict) -> str:
    """SHA-256 key of a table kind, its inputs and the code version.

    Parameters
    ----------
    kind : str
        Table family, e.g. ``"linear-sheet"``.
    inputs : dict
        JSON-serialisable description of every input of the table.
    """
    blob = json.dumps({"kind": kind, "inputs": inputs, "version": __version__},
                      sort_keys=True, default=float)
    return f"{kind}-{hashlib.sha256(blob.encode()).hexdigest()[:24]}"


def load_arrays(key: str, required: tuple[str, ...]) -> dict | None:
    """Load a cache entry, or ``None`` if absent, corrupt or incomplete."""
    path = cache_dir() / f"{key}.npz"
    if not path.exists():
        return None
    try:
        with np.load(path, allow_pickle=False) as npz:
            out = {name: npz[name] for name in npz.files}
    except Exception as exc:  # corrupt file: rebuild
        log.warning("cache entry %s unreadable (%s); rebuilding", path, exc)
        return None
    if any(name not in out for name in required) or any(
            not np.all(np.isfinite(out[n])) for n in required
            if np.issubdtype(out[n].dtype, np.number)):
        log.warning("cache entry %s incomplete or non-finite; rebuilding", path)
        return None
    return out


def save_arrays(key: str, arrays: dict) -> Path:
    """Write a cache entry atomically (temporary file + rename)."""
    folder = cache_dir()
    final = folder / f"{key}.npz"
    fd, tmp = tempfile.mkstemp(dir=folder, suffix=".npz.tmp")
    try:
        with os.fdopen(fd, "wb") as fh:
            np.savez(fh, **arrays)
        os.replace(tmp, final)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
    return final
