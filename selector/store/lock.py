"""The run lock: one process at a time rewrites a run folder.

It lives with the storage because it guards files (the run folder and its manifest), not a step of
the run: anything that rewrites tile results takes it, whichever job it belongs to.
"""

from __future__ import annotations

import fcntl
import os
import socket
from pathlib import Path

from selector.errors import SelectorError
from selector.store.layout import layout_of
from selector.store.manifest import utc_now

# the descriptor this process holds, so that a forked worker can close its inherited copy
_LOCK_FD: int | None = None


class RunLock:
    """Exclusive use of a run folder for one process, released by the kernel when it dies.

    Parameters
    ----------
    path : pathlib.Path
        The lock file (``Layout.run_lock``); its folder is the run folder, created when missing.

    Raises
    ------
    SelectorError
        When another process holds the folder; the message names the folder and that process.
    """

    def __init__(self, path: Path):
        self.path = Path(path)
        self.fd = None

    def __enter__(self):
        global _LOCK_FD
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
        except OSError as exc:
            raise SelectorError(f"{self.path.parent}: cannot write the run folder ({exc.strerror}); check "
                                "project.output_dir") from None
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            holder = os.pread(fd, 200, 0).decode(errors="replace").strip() or "another process"
            os.close(fd)
            raise SelectorError(f"{self.path.parent}: another `selector run` is using this folder ({holder}); wait "
                                "for it to finish (`selector status --config ...` shows its progress) or give "
                                "this run another project.output_dir") from None
        except OSError as exc:
            os.close(fd)
            raise SelectorError(f"{self.path}: cannot lock the run folder ({exc.strerror}); its file system does "
                                "not support locks, so put project.output_dir on one that does") from None
        os.ftruncate(fd, 0)
        os.pwrite(fd, f"pid {os.getpid()} on {socket.gethostname()}, since {utc_now()}\n".encode(), 0)
        self.fd = _LOCK_FD = fd
        return self

    def __exit__(self, *exc):
        global _LOCK_FD
        if self.fd is not None:
            os.ftruncate(self.fd, 0)
            fcntl.flock(self.fd, fcntl.LOCK_UN)
            os.close(self.fd)
            self.fd = _LOCK_FD = None


def run_lock(cfg) -> RunLock:
    """The lock of ``cfg``'s run folder, for anything else that rewrites tile results."""
    return RunLock(layout_of(cfg).run_lock)


def close_inherited_lock() -> None:
    """In a forked child: close the copy of the parent's lock descriptor.

    Closing a copy never releases the parent's ``flock``; it only keeps a worker that outlives its
    parent from holding the folder.
    """
    if _LOCK_FD is not None:
        try:
            os.close(_LOCK_FD)
        except OSError:
            pass
