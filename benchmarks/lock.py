"""One run at a time per results store: a lock file beside the store naming its holder.

A run holds an exclusive ``flock`` on ``<store>.lock`` for as long as it
writes, and writes its PID, host and start time into the file so that a
second run can say who holds it. The kernel releases the ``flock`` when the
holder dies however it dies (SIGKILL included), so a lock file left by a dead
run is stale and the next run takes it over; the PID in it is only the
message. ``flock`` is advisory and local: on a network file system that does
not support it, two runs on different hosts are not kept apart.
"""

from __future__ import annotations

import errno
import fcntl
import os
import socket
import time
from pathlib import Path

from needbench.envs.errors import ConfigError


def _holder(path: Path) -> str:
    """The holder's record (PID, host, start) as one line, or a placeholder."""
    try:
        fields = path.read_text(encoding="utf-8").split()
    except OSError:
        fields = []
    if len(fields) >= 3:
        started = time.strftime("%Y-%m-%d %H:%M:%S UTC", time.gmtime(float(fields[2])))
        return f"PID {fields[0]} on {fields[1]}, since {started}"
    return "another process"


#: Locks this process holds: resolved lock path -> (descriptor, nesting depth).
_HELD: dict[Path, list[int]] = {}


class ResultsLock:
    """An exclusive lock on a results store, held by one run (a context manager).

    Args:
        store_path: the results store file; the lock is ``<store_path>.lock``.

    Re-entrant within a process: the command line takes the lock before it
    opens the store, and :func:`~needbench.benchmarks.runner.run_suite`
    takes it again.

    Raises (from :meth:`acquire`):
        ConfigError: path ``results``, when another live run holds the lock, or
            when the folder cannot be written (read-only, full, no permission):
            either way before any job starts.
    """

    def __init__(self, store_path: str | Path):
        self.path = Path(str(store_path) + ".lock")
        self._key = self.path.resolve()
        self._holding = False

    def acquire(self) -> ResultsLock:
        if self._key in _HELD:
            _HELD[self._key][1] += 1
            self._holding = True
            return self
        while True:
            try:
                descriptor = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
            except OSError as error:
                raise self._unwritable(error) from error
            try:
                fcntl.flock(descriptor, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except BlockingIOError:
                os.close(descriptor)
                raise ConfigError("results", str(self.path.parent),
                                  f"a results store no other run is writing: "
                                  f"{_holder(self.path)} holds {self.path} (wait for that run "
                                  "to end, or give this one another --out)") from None
            # The holder may have removed the file between our open and flock:
            # then we hold a lock on a file no one else will open, so start again.
            try:
                current = os.stat(self.path).st_ino
            except FileNotFoundError:
                current = None
            if current != os.fstat(descriptor).st_ino:
                os.close(descriptor)
                continue
            try:
                os.ftruncate(descriptor, 0)
                record = f"{os.getpid()} {socket.gethostname()} {time.time():.3f}\n"
                os.write(descriptor, record.encode())
                os.fsync(descriptor)
            except OSError as error:
                os.close(descriptor)
                raise self._unwritable(error) from error
            _HELD[self._key] = [descriptor, 1]
            self._holding = True
            return self

    def _unwritable(self, error: OSError) -> ConfigError:
        reason = {errno.EROFS: "the file system is read-only", errno.EACCES: "no permission",
                  errno.EPERM: "no permission", errno.ENOSPC: "the disk is full",
                  errno.EDQUOT: "the disk quota is used up"}.get(error.errno, str(error))
        return ConfigError("results", str(self.path.parent),
                           f"a folder this user can write to ({reason}: cannot write "
                           f"{self.path.name})")

    def release(self) -> None:
        if not self._holding:
            return
        self._holding = False
        held = _HELD[self._key]
        held[1] -= 1
        if held[1]:
            return
        del _HELD[self._key]
        # Unlink while still holding the flock, so no one can take a lock on
        # the file we are about to leave.
        try:
            self.path.unlink(missing_ok=True)
        finally:
            os.close(held[0])

    def __enter__(self) -> ResultsLock:
        return self.acquire()

    def __exit__(self, *exc_info: object) -> None:
        self.release()
