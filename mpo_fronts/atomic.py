"""Atomic writes: every file of a run is written to a temporary name in its folder, fsynced and renamed into
place (and the folder fsynced), so that a killed process never leaves a half-written file."""

from __future__ import annotations

import contextlib
import json
import os
import uuid
from pathlib import Path
from typing import Any, Callable

__all__ = ["atomic_h5", "atomic_text", "tmp_name", "to_json", "package_info"]


def package_info() -> tuple[str, str]:
    from .conventions import CONVENTIONS, __version__

    return __version__, CONVENTIONS


# ------------------------------------------------------------------------------------------- atomic writing
def _fsync_dir(path: Path) -> None:
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:  # pragma: no cover - platforms without directory fds
        return
    try:
        os.fsync(fd)
    except OSError:  # pragma: no cover
        pass
    finally:
        os.close(fd)


def tmp_name(path: Path) -> Path:
    return path.with_name(f".{path.name}.{os.getpid()}.{uuid.uuid4().hex[:8]}.tmp")


def _atomic_replace(path: Path, write_tmp: Callable[[Path], None]) -> Path:
    """Let ``write_tmp(tmp)`` write a temporary sibling of path, fsync it, rename it into place, fsync the folder.

    A killed process leaves at most a stray temporary file, never a half-written ``path``.
    """
    tmp = tmp_name(path)
    try:
        write_tmp(tmp)
        with open(tmp, "rb") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            tmp.unlink()
        raise
    _fsync_dir(path.parent)
    return path


def atomic_h5(path, write: Callable[[Any], None]) -> Path:
    """Write an HDF5 file through ``write(h5file)`` to a temporary name, fsync it and rename it into place."""
    import h5py

    def write_tmp(tmp: Path) -> None:
        with h5py.File(tmp, "w") as f:
            write(f)
            f.flush()

    return _atomic_replace(Path(path), write_tmp)


def atomic_text(path: Path, text: str) -> None:
    _atomic_replace(path, lambda tmp: tmp.write_text(text))


def to_json(obj) -> str:
    return json.dumps(obj, sort_keys=True, allow_nan=False)
