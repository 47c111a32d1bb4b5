"""Outputs are written under a temporary name beside the target and renamed on success,
so an interrupted run never leaves a half-written file or folder behind."""

from __future__ import annotations

import os
import shutil
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

from ..errors import InputError


def check_target(target: str | Path, overwrite: bool) -> Path:
    """Refuse to replace an existing output unless asked to (``--overwrite`` on the command line,
    ``overwrite=True`` from Python; the message speaks the command line's words)."""
    target = Path(target)
    if target.exists() and not overwrite:
        raise InputError(f"{target}: already exists; pass --overwrite to replace it")
    if not target.parent.exists():
        target.parent.mkdir(parents=True, exist_ok=True)
    return target


_interrupted = False


def interrupt() -> None:
    """Note that the run was asked to stop; no output is committed after this."""
    global _interrupted
    _interrupted = True


def clear_interrupt() -> None:
    """Forget a stop request once its command has returned (the next call may commit again)."""
    global _interrupted
    _interrupted = False


def _commit_allowed() -> None:
    # a stop signal can be swallowed when it lands inside library clean-up code; checking here
    # makes sure nothing is renamed into place once one has arrived
    if _interrupted:
        raise KeyboardInterrupt


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


@contextmanager
def atomic_file(target: str | Path, overwrite: bool = True) -> Iterator[Path]:
    """Yield a temporary path; on success it replaces ``target``, on failure it is removed."""
    target = check_target(target, overwrite)
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".part", dir=target.parent)
    os.close(fd)
    tmp = Path(tmp)
    try:
        yield tmp
        os.chmod(tmp, 0o666 & ~_umask())  # mkstemp makes 0600; give the file the usual mode
        _commit_allowed()
        os.replace(tmp, target)
    finally:
        if tmp.exists():
            tmp.unlink()


@contextmanager
def atomic_folder(target: str | Path, overwrite: bool = False) -> Iterator[Path]:
    """Yield a temporary folder; on success it becomes ``target`` (replacing it if allowed)."""
    target = check_target(target, overwrite)
    tmp = Path(tempfile.mkdtemp(prefix=f".{target.name}.", suffix=".part", dir=target.parent))
    try:
        yield tmp
        os.chmod(tmp, 0o777 & ~_umask())
        _commit_allowed()
        if target.exists():
            old = target.with_name(f".{target.name}.old")
            if old.exists():
                shutil.rmtree(old)
            os.replace(target, old)
            os.replace(tmp, target)
            shutil.rmtree(old, ignore_errors=True)
        else:
            os.replace(tmp, target)
    finally:
        if tmp.exists():
            shutil.rmtree(tmp, ignore_errors=True)
