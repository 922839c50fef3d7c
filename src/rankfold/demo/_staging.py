"""Write a demo dataset into a hidden sibling folder, then move it into place.

Generating the larger demo sizes takes a while; if it is interrupted we must
not leave a half-written store behind that a later run would mistake for a
finished one.  Everything is written into ``.<name>.<random>.partial`` next to
the target and renamed only once the writer returned normally.
"""

from __future__ import annotations

import contextlib
import os
import secrets
import shutil
from collections.abc import Iterator
from pathlib import Path

from rankfold.errors import OutputError


def remove_path(path: Path) -> None:
    """Delete a file or a folder tree.

    Parameters
    ----------
    path : Path
        What to delete; nothing happens when it does not exist.
    """
    if path.is_dir() and not path.is_symlink():
        shutil.rmtree(path)
    elif path.exists() or path.is_symlink():
        path.unlink()


def _new_scratch(target: Path) -> Path:
    """Create an empty hidden folder beside `target`.

    ``os.mkdir`` honours the umask, unlike ``tempfile.mkdtemp`` (always 0700),
    so the renamed folder ends up with the permissions of any other folder.
    """
    while True:
        scratch = target.parent / f".{target.name}.{secrets.token_hex(4)}.partial"
        try:
            scratch.mkdir()
            return scratch
        except FileExistsError:
            continue


@contextlib.contextmanager
def staged_directory(target: str | os.PathLike, *, overwrite: bool) -> Iterator[Path]:
    """Yield an empty scratch folder that replaces `target` on success.

    Parameters
    ----------
    target : str or os.PathLike
        Final location of the folder.
    overwrite : bool
        Replace `target` if it already exists; otherwise refuse.

    Yields
    ------
    Path
        The empty scratch folder to write into.

    Raises
    ------
    OutputError
        If `target` exists and `overwrite` is false.
    """
    target = Path(target)
    if target.exists() and not overwrite:
        raise OutputError(f"{target} already exists; pass overwrite=True to replace it")
    target.parent.mkdir(parents=True, exist_ok=True)
    scratch = _new_scratch(target)
    try:
        yield scratch
    except BaseException:
        shutil.rmtree(scratch, ignore_errors=True)
        raise
    # The old copy goes only now, so a failed run never destroys a good one.
    remove_path(target)
    os.replace(scratch, target)
