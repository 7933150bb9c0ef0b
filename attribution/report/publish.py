"""Publishing a night's pages atomically: staged in a temporary folder beside the target, moved into place."""

from __future__ import annotations

import fcntl
import os
import secrets
import shutil
from collections.abc import Callable, Mapping
from pathlib import Path

from attribution.report.queries import ReportError


def _remove_leftovers(target: Path) -> None:
    """Remove the staging and set-aside folders of ``target``'s date that an interrupted render left.

    Safe because one date is rendered by one run at a time (the engine renders under the archive lock).
    """
    for pattern in (f".{target.name}.tmp-*", f".{target.name}.old-*"):
        for stale in target.parent.glob(pattern):
            if stale.is_dir() and not stale.is_symlink():
                shutil.rmtree(stale, ignore_errors=True)


def write_atomically(target: Path, files: Mapping[str, str], before_moving: Callable[[], object] | None = None) -> None:
    """Write ``files`` into a temporary folder beside ``target``, then move it into place.

    Leftovers of an earlier interrupted render of the same date are removed first. ``before_moving`` is called
    between the two: if it raises, the temporary folder is removed, ``target`` is left as it was, and its error
    is raised.
    """
    target.parent.mkdir(parents=True, exist_ok=True)
    # Runs on different archives may share a reports folder: they take turns here (an OS lock,
    # released by the kernel however a run ends), so one never cleans up the other's staging.
    # The lock is on the folder itself, so it leaves no file behind.
    folder = os.open(target.parent, os.O_RDONLY | os.O_DIRECTORY)
    try:
        fcntl.flock(folder, fcntl.LOCK_EX)
        _stage_and_move(target, files, before_moving)
    finally:
        os.close(folder)


def _plain_name(name: str) -> bool:
    """A file name with no folder part (no separator, not ``.`` or ``..``, no NUL): a direct child of the folder."""
    seps = {"/", os.sep, os.altsep or "/", "\0"}
    return bool(name) and name not in (".", "..") and not any(sep in name for sep in seps)


def _stage_and_move(target: Path, files: Mapping[str, str], before_moving: Callable[[], object] | None) -> None:
    _remove_leftovers(target)
    staging = target.parent / f".{target.name}.tmp-{secrets.token_hex(6)}"
    staging.mkdir()  # the usual permissions (umask), unlike a private mkdtemp folder
    old: Path | None = None
    try:
        for name in files:
            if not _plain_name(name):
                raise ReportError(f"report: file name {name!r} would leave the report folder")
        for name, text in files.items():
            with open(staging / name, "w", encoding="utf-8") as out:  # a new file in the new folder
                out.write(text)
        if before_moving is not None:
            before_moving()
        if target.exists():
            old = target.parent / f".{target.name}.old-{secrets.token_hex(6)}"
            target.rename(old)
        staging.rename(target)
    except BaseException:
        shutil.rmtree(staging, ignore_errors=True)
        if old is not None and old.exists() and not target.exists():
            old.rename(target)
        raise
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)
