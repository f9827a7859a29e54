"""One writer per output file, and the clean-up of what killed writers leave behind.

Every process that creates, replaces, resumes or merges into an output file ``F`` first takes
an exclusive lock on ``.F.lock`` next to it and holds it until it is done (`OutputLock`);
a second writer that finds the lock taken fails at once (after `LOCK_WAIT` seconds of retries,
for a lock that is being released) with one line naming the holder. Readers never lock: the
writer changes a store only in ways that keep every moment readable (`tba.store.hdf5`), and
`holder` tells a reader whether a writer is at work, so that an inconsistency it sees can be
told from damage.

The lock is an open-file-description lock (``F_OFD_SETLK``, Linux; ``flock`` elsewhere):
the kernel drops it when its holder dies, so a killed ``tba run`` never leaves a stale lock,
and it works across machines on NFS when the server has lock support. Its holder removes the
lock file when done; since a waiting process may have opened the file before that, a lock is
only valid if the locked file is still the one at ``.F.lock`` (the usual protocol).

Files created under a temporary name (``.F.partial-HOST-PID``, renamed to ``F`` when complete)
by a process that was killed are removed by the next writer of ``F`` (`clean_partials`), if
they were made on this host by a process that no longer exists.
"""

import datetime
import errno
import fcntl
import json
import os
import platform
import struct
import time
from pathlib import Path

from tba.store.errors import StoreBusy, StoreError

#: seconds a writer retries a taken lock before it gives up (a lock being released)
LOCK_WAIT = 2.0
_OFD = hasattr(fcntl, "F_OFD_SETLK")
_FLOCK_STRUCT = "hhqqi4x"  # struct flock: l_type, l_whence, l_start, l_len, l_pid


def lock_path(path):
    path = Path(path)
    return path.with_name(f".{path.name}.lock")


def partial_path(path):
    """The temporary name a new version of ``path`` is written under."""
    path = Path(path)
    return path.with_name(f".{path.name}.partial-{platform.node()}-{os.getpid()}")


def _ofd(fd, command, kind):
    return fcntl.fcntl(fd, command, struct.pack(_FLOCK_STRUCT, kind, os.SEEK_SET, 0, 0, 0))


def _try_lock(fd):
    try:
        if _OFD:
            _ofd(fd, fcntl.F_OFD_SETLK, fcntl.F_WRLCK)
        else:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except OSError as exc:
        if exc.errno in (errno.EAGAIN, errno.EACCES, errno.EWOULDBLOCK):
            return False
        raise
    return True


def _is_locked(fd):
    if _OFD:
        kind = struct.unpack(_FLOCK_STRUCT, _ofd(fd, fcntl.F_OFD_GETLK, fcntl.F_WRLCK))[0]
        return kind != fcntl.F_UNLCK
    try:  # flock cannot be queried: take a shared lock for a moment
        fcntl.flock(fd, fcntl.LOCK_SH | fcntl.LOCK_NB)
    except OSError:
        return True
    fcntl.flock(fd, fcntl.LOCK_UN)
    return False


def _describe(info):
    if not info:
        return "another process"
    return (f"{info.get('command', 'tba')} (pid {info.get('pid', '?')} on {info.get('host', '?')}, "
            f"since {info.get('since', '?')})")


def _read_info(path):
    try:
        return json.loads(Path(path).read_text(encoding="utf-8") or "{}")
    except (OSError, ValueError):
        return {}


def holder(path):
    """Who holds the lock of ``path`` (a dict: pid, host, command, since; {} if unknown), or
    None when no process does. Never takes the lock (on Linux)."""
    try:
        fd = os.open(lock_path(path), os.O_RDONLY | os.O_CLOEXEC)
    except OSError:
        return None
    try:
        if not _is_locked(fd):
            return None
    except OSError:
        return None
    finally:
        os.close(fd)
    return _read_info(lock_path(path))


class OutputLock:
    """The exclusive lock of an output file, for ``with``: `StoreBusy` if another process
    holds it, `StoreError` if it cannot be made (``unwritable`` is then the OSError: a
    read-only file system or directory)."""

    def __init__(self, path, command="tba run"):
        self.path, self.command = Path(path), command
        self.fd = None
        self.unwritable = None

    def __enter__(self):
        return self.acquire()

    def __exit__(self, *exc):
        self.release()
        return False

    def acquire(self):
        lp = lock_path(self.path)
        deadline = time.monotonic() + LOCK_WAIT
        while True:
            try:
                fd = os.open(lp, os.O_RDWR | os.O_CREAT | os.O_CLOEXEC, 0o644)
            except OSError as exc:
                self.unwritable = exc
                raise StoreError(f"{self.path}: cannot be written ({exc.strerror}: "
                                 f"{lp.parent})") from None
            if _try_lock(fd):
                try:
                    same = os.fstat(fd).st_ino == os.stat(lp).st_ino
                except FileNotFoundError:
                    same = False
                if same:
                    self.fd = fd
                    self._write_info()
                    return self
            os.close(fd)  # taken, or released and removed meanwhile: look again
            if time.monotonic() > deadline:
                raise StoreBusy(f"{self.path}: being written by {_describe(_read_info(lp))}; "
                                f"wait until it has finished, or write to another file (--output)")
            time.sleep(0.05)

    def _write_info(self):
        info = {"pid": os.getpid(), "host": platform.node(), "command": self.command,
                "since": datetime.datetime.now(datetime.timezone.utc).isoformat(timespec="seconds")}
        try:  # who holds it, for the message of the next writer; optional (a full disk)
            os.ftruncate(self.fd, 0)
            os.pwrite(self.fd, json.dumps(info).encode(), 0)
        except OSError:
            pass

    def release(self):
        if self.fd is not None:
            try:
                os.unlink(lock_path(self.path))
            except OSError:
                pass
            os.close(self.fd)  # releases the lock
            self.fd = None


def _alive(pid):
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # someone else's process
        return True
    return True


def clean_partials(path):
    """Remove the temporary files of ``path`` left by killed writers on this host (their
    process no longer exists); call it holding the lock of ``path``. Returns the removed
    paths. Also the names ``.F.partial-PID`` of tba versions before schema 4."""
    path = Path(path)
    prefix = f".{path.name}.partial-"
    removed = []
    try:
        names = os.listdir(path.parent)
    except OSError:
        return removed
    for name in names:
        if not name.startswith(prefix):
            continue
        host, _, pid = name[len(prefix):].rpartition("-")
        if not pid.isdigit() or host not in ("", platform.node()):
            continue
        if int(pid) != os.getpid() and _alive(int(pid)):  # ours is stale: we hold the lock
            continue
        try:
            os.unlink(path.parent / name)
            removed.append(path.parent / name)
        except OSError:
            pass
    return removed
