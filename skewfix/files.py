"""Files that appear whole or not at all.

Everything skewfix writes goes to a hidden temporary name beside its final
name and is renamed into place (an atomic `os.replace` on one file system)
only when complete; on any exception, Ctrl-C included, the temporary file is
removed. The temporary name is chosen before the file exists, so there is no
instant at which a file exists under a name the writer does not hold.

An output's folder that does not exist yet is made when writing starts
(`make_folders`), and removed again, if still empty, when the writing fails
(`remove_folders`), so a failed run leaves no empty folders either.
"""

from __future__ import annotations

import os
import uuid
from pathlib import Path
from typing import Callable, Union

Writer = Callable[[str], None]


def partial_name(output: str | os.PathLike) -> Path:
    """A unique hidden temporary name beside OUTPUT (not created), keeping its extension."""
    output = Path(output)
    return output.parent / f".{output.stem}.{uuid.uuid4().hex[:10]}.partial{output.suffix}"


def nearest_existing(folder: str | os.PathLike) -> Path:
    """``folder`` itself, or the closest of its parents that exists."""
    folder = Path(os.path.abspath(folder))
    while not folder.exists() and folder != folder.parent:
        folder = folder.parent
    return folder


def make_folders(folder: str | os.PathLike) -> list[Path]:
    """Make ``folder`` and any missing parents; returns the folders made, innermost first."""
    folder = Path(os.path.abspath(folder))
    missing = []
    while not folder.exists() and folder != folder.parent:
        missing.append(folder)
        folder = folder.parent
    for path in reversed(missing):
        path.mkdir(exist_ok=True)
    return missing


def remove_folders(made: list[Path]) -> None:
    """Remove folders `make_folders` made, innermost first, as long as they are empty."""
    for path in made:
        try:
            path.rmdir()
        except OSError:
            return


def write_whole(path: str | os.PathLike, content: Union[str, bytes, Writer]) -> Path:
    """Write ``content`` (text, bytes, or ``writer(temporary_path)``) to ``path`` whole.

    Text and bytes are flushed to disk before the rename. The file gets the
    usual permissions (the process umask), like any file the user creates.
    """
    target = Path(path)
    tmp = partial_name(target)
    made = make_folders(target.parent)
    try:
        if callable(content):
            content(str(tmp))
        else:
            data = content.encode("utf-8") if isinstance(content, str) else content
            with open(tmp, "wb") as handle:
                handle.write(data)
                handle.flush()
                os.fsync(handle.fileno())
        os.replace(tmp, target)
    except BaseException:
        tmp.unlink(missing_ok=True)
        remove_folders(made)
        raise
    return target
