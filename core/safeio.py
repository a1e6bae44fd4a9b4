"""Safe writing of the user's files.

Every file Gyrometer writes goes through :func:`atomic_output`: the content
is written to a temporary file in the target's folder and renamed over the
target only when complete, so a failed or cancelled run leaves no
half-written file. An existing file is never replaced unless ``overwrite``
is true (the command line's ``--force``).
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from pathlib import Path
from typing import Iterator

from .errors import OutputError

__all__ = ["atomic_output", "write_text_atomic", "write_bytes_atomic",
           "check_writable"]


def check_writable(path: str | os.PathLike, overwrite: bool = False) -> Path:
    """Raise :class:`OutputError` if ``path`` exists and may not be replaced."""
    target = Path(path)
    if target.exists() and not overwrite:
        raise OutputError("file exists; not overwritten", path=str(target),
                          hint="use --force (or choose another name) to replace it")
    if target.exists() and target.is_dir():
        raise OutputError("a folder has this name", path=str(target))
    return target


@contextlib.contextmanager
def atomic_output(path: str | os.PathLike, overwrite: bool = False,
                  suffix: str | None = None) -> Iterator[Path]:
    """Yield a temporary path; rename it to ``path`` if the block succeeds.

    Parameters
    ----------
    path : path-like
        Final destination.
    overwrite : bool
        Replace an existing file.
    suffix : str, optional
        Suffix of the temporary file (some writers choose the format from
        it); defaults to the target's suffix.
    """
    target = check_writable(path, overwrite)
    folder = target.parent if str(target.parent) else Path(".")
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"cannot create the folder ({exc.strerror})",
                          path=str(folder)) from exc
    fd, tmp_name = tempfile.mkstemp(prefix=f".{target.name}.", suffix=(
        target.suffix if suffix is None else suffix) + ".part", dir=folder)
    os.close(fd)
    tmp = Path(tmp_name)
    tmp.unlink()  # writers that refuse existing files get a free name
    try:
        yield tmp
        if not tmp.exists():
            raise OutputError("the writer produced no file", path=str(target))
        if target.exists() and not overwrite:  # appeared meanwhile
            raise OutputError("file exists; not overwritten", path=str(target),
                              hint="use --force to replace it")
        os.replace(tmp, target)
    except BaseException:
        with contextlib.suppress(OSError):
            tmp.unlink()
        raise


def write_text_atomic(path: str | os.PathLike, text: str,
                      overwrite: bool = False) -> Path:
    """Write ``text`` (UTF-8) to ``path`` atomically."""
    with atomic_output(path, overwrite) as tmp:
        tmp.write_text(text, encoding="utf-8")
    return Path(path)


def write_bytes_atomic(path: str | os.PathLike, data: bytes,
                       overwrite: bool = False) -> Path:
    """Write ``data`` to ``path`` atomically."""
    with atomic_output(path, overwrite) as tmp:
        tmp.write_bytes(data)
    return Path(path)
