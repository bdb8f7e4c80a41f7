"""One lock per output folder: readers share it, writers hold it alone.

Every command that touches an output folder takes its lock (``<output_dir>/.lock``, see
:attr:`~selector.store.layout.Layout.lock_file`) with ``fcntl.flock``, which the kernel releases
however the process dies:

=============================================  =========
``selector ingest``, ``selector run``,         exclusive
``selector tune --write``
``selector train``, ``tune``, ``targets``,     shared
``outcome``, ``weigh``, ``report``
=============================================  =========

So no command reads what another is writing: a run never sees a half-switched generation of
tiles, ``targets`` never reads a list while a run rewrites it, and a second ingest or run on the
same folder is refused with one line. ``selector status`` takes no lock: it only reads the run
manifest, which SQLite keeps consistent, so it can watch a run in progress.

A refused command waits for nothing: it says who holds the folder and exits. The exclusive holder
writes who it is into the lock file (command, pid, host, start) for that message.

Locks do not nest: a process that holds the folder and asks again is refused like any other
(``flock`` locks on two descriptors of one file conflict even within a process), so each command
takes the lock once, at its top.
"""

from __future__ import annotations

import errno
import fcntl
import os
import socket
from pathlib import Path

from selector.errors import SelectorError
from selector.store.layout import Layout
from selector.store.manifest import utc_now

# the descriptor this process holds, so that a forked worker can close its inherited copy
_LOCK_FD: int | None = None

_READERS = "targets, train, tune, outcome, weigh or report"


def _folder_error(folder: Path, exc: OSError) -> SelectorError:
    """The one-line message for an output folder that cannot be used."""
    if isinstance(exc, (FileExistsError, NotADirectoryError)) or exc.errno in (errno.EEXIST, errno.ENOTDIR):
        return SelectorError(f"{folder}: is a file, not a folder; set project.output_dir to a folder (it is "
                             "created when missing)")
    if exc.errno in (errno.EROFS, errno.EACCES, errno.EPERM):
        return SelectorError(f"{folder}: cannot write in this folder ({exc.strerror}); make it writable or set "
                             "project.output_dir to a folder you can write")
    if exc.errno in (errno.ENOSPC, errno.EDQUOT):
        return SelectorError(f"{folder}: no space left on the device; free some space or move project.output_dir")
    return SelectorError(f"{folder}: cannot use this output folder ({exc.strerror or exc}); check project.output_dir")


class FolderLock:
    """The lock of one output folder, shared (readers) or exclusive (writers).

    Parameters
    ----------
    output_dir : path
        The output folder (``project.output_dir``); created by an exclusive lock when missing.
    command : str
        The command taking it (``run``, ``ingest``, ``targets``, ...), named in refusals.
    exclusive : bool
        Writers take the folder alone; readers share it with other readers.

    Raises
    ------
    SelectorError
        One line when another command holds the folder in a conflicting way, or when the folder
        cannot be used (a file, read-only, full).
    """

    def __init__(self, output_dir: Path | str, command: str, *, exclusive: bool):
        self.layout = Layout(Path(output_dir))
        self.command = command
        self.exclusive = exclusive
        self.fd = None

    @property
    def folder(self) -> Path:
        return self.layout.output_dir

    def _open(self) -> int | None:
        path = self.layout.lock_file
        if self.exclusive:
            try:
                self.folder.mkdir(parents=True, exist_ok=True)
                return os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
            except OSError as exc:
                raise _folder_error(self.folder, exc) from None
        if self.folder.exists() and not self.folder.is_dir():
            raise _folder_error(self.folder, NotADirectoryError(errno.ENOTDIR, "not a folder"))
        if not self.folder.is_dir():
            return None  # nothing to read yet: the command says so itself
        for flags in (os.O_RDWR | os.O_CREAT, os.O_RDONLY):
            try:
                return os.open(path, flags, 0o644)
            except OSError:
                continue
        return None  # a folder nobody can write: nobody can be writing it either

    def __enter__(self):
        global _LOCK_FD
        fd = self._open()
        if fd is None:
            return self
        try:
            fcntl.flock(fd, (fcntl.LOCK_EX if self.exclusive else fcntl.LOCK_SH) | fcntl.LOCK_NB)
        except BlockingIOError:
            holder = os.pread(fd, 200, 0).decode(errors="replace").strip()
            os.close(fd)
            raise self._refusal(holder) from None
        except OSError as exc:
            os.close(fd)
            raise SelectorError(f"{self.layout.lock_file}: cannot lock the output folder ({exc.strerror}); its file "
                                "system does not support locks, so put project.output_dir on one that does") from None
        try:
            if self.exclusive:
                os.ftruncate(fd, 0)
                os.pwrite(fd, f"selector {self.command}, pid {os.getpid()} on {socket.gethostname()}, "
                              f"since {utc_now()}\n".encode(), 0)
            elif os.fstat(fd).st_size:
                # a shared lock means no writer holds the folder: what the file says is left by a
                # killed writer, and would mislead the next refusal
                os.ftruncate(fd, 0)
        except OSError:
            pass  # the note is for messages only; a read-only lock file still locks
        self.fd = fd
        if self.exclusive:
            _LOCK_FD = fd
        return self

    def _refusal(self, holder: str) -> SelectorError:
        again = f"then run `selector {self.command}` again"
        if holder.startswith("selector "):
            other = holder.split(",", 1)[0]
            if self.exclusive:
                return SelectorError(f"{self.folder}: another `{other}` is using this folder ({holder}); wait for "
                                     f"it to finish (`selector status --config ...` shows a run's progress), {again}, "
                                     "or give this one another project.output_dir")
            return SelectorError(f"{self.folder}: `{other}` is writing this folder ({holder}); wait for it to "
                                 f"finish, {again}")
        return SelectorError(f"{self.folder}: another selector command ({_READERS}) is reading this folder; wait "
                             f"for it to finish, {again}")

    def __exit__(self, *exc):
        global _LOCK_FD
        if self.fd is not None:
            if self.exclusive:
                try:
                    os.ftruncate(self.fd, 0)
                except OSError:
                    pass
            fcntl.flock(self.fd, fcntl.LOCK_UN)
            os.close(self.fd)
            if _LOCK_FD == self.fd:
                _LOCK_FD = None
            self.fd = None


def output_lock(cfg, command: str, *, exclusive: bool) -> FolderLock:
    """The lock of ``cfg``'s output folder for ``command`` (see :class:`FolderLock`)."""
    return FolderLock(cfg.output_dir, command, exclusive=exclusive)


def run_lock(cfg) -> FolderLock:
    """The exclusive lock a run takes, for anything else that rewrites tile results."""
    return output_lock(cfg, "run", exclusive=True)


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
