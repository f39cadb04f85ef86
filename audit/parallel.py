"""Part of a stage done by a forked child process, on the machine's second core.

Most of an audit's time after the arithmetic is Python work (building notes, messages, JSON
text) that threads cannot share out. A forked child shares the audit's tables without copying
or pickling them, does its part and writes the result to an unlinked temporary file, and leaves
with ``os._exit`` (it never flushes or closes anything of the parent's). The parent does the
other part meanwhile, then reads the file.

A child is a speed-up only, never a dependency: where fork is not available or not safe
(Windows has none; on macOS system libraries may not survive it), with one core, or when the
child fails, :meth:`ChildTask.result` returns None and the caller does the work itself.

>>> def work(out):
...     out.write(b"done in a child")
>>> with ChildTask(work) as task:
...     found = task.result()
...     text = found.read() if found is not None else b"done in a child"
>>> text
b'done in a child'
"""

from __future__ import annotations

import contextlib
import gc
import os
import signal
import sys
import tempfile
import warnings
from collections.abc import Callable
from pathlib import Path
from typing import IO

__all__ = ["ChildTask", "can_fork"]

#: Set to False to keep every stage in one process (tests use it to compare the two ways).
ENABLED = True


def can_fork() -> bool:
    """Whether work can go to a forked child here: Linux, more than one core, enabled."""
    if not ENABLED or not sys.platform.startswith("linux") or not hasattr(os, "fork"):
        return False
    try:
        return len(os.sched_getaffinity(0)) > 1
    except (AttributeError, OSError):
        return (os.cpu_count() or 1) > 1


class ChildTask:
    """``work(out)`` run in a forked child that writes its result to the binary file ``out``.

    Use as a context manager: the child starts on entry; :meth:`result` waits for it and gives
    the file, rewound, or None if there was no child or it failed. On exit a child still running
    (the parent failed first) is stopped, and the file is closed.
    """

    def __init__(self, work: Callable[[IO[bytes]], None], folder: str | Path | None = None):
        self._work = work
        self._folder = folder
        self._pid = 0
        self._file: IO[bytes] | None = None

    def __enter__(self) -> ChildTask:
        return self.start()

    def start(self) -> ChildTask:
        """Fork the child (where possible); :meth:`close` must follow, as ``with`` does."""
        if not can_fork():
            return self
        try:
            self._file = tempfile.TemporaryFile(dir=self._folder)
            # The cycle collector writes to every object it examines, and each write copies a
            # shared page: the objects existing now are left out of its passes while the child
            # runs (gc.freeze), and the child, which lives for one task, does not collect.
            gc.freeze()
            with warnings.catch_warnings():
                # Python 3.12+ warns about forking a process that has threads (a progress
                # bar's refresh thread): the child takes no lock such a thread could hold; it
                # only computes and writes to its own file.
                warnings.simplefilter("ignore", DeprecationWarning)
                self._pid = os.fork()
        except OSError:
            self._pid = 0
            gc.unfreeze()
            return self
        if self._pid == 0:
            gc.disable()
            self._run_child()
        return self

    def _run_child(self) -> None:
        status = 1
        try:
            assert self._file is not None
            self._work(self._file)
            self._file.flush()
            status = 0
        finally:
            os._exit(status)

    def result(self) -> IO[bytes] | None:
        """The child's file, rewound, if it finished successfully; else None."""
        if not self._pid or self._file is None:
            return None
        pid, self._pid = self._pid, 0
        _, status = os.waitpid(pid, 0)
        gc.unfreeze()
        if os.waitstatus_to_exitcode(status) != 0:
            return None
        self._file.seek(0)
        return self._file

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        """Stop a child still running, and close the file (again: a no-op)."""
        if self._pid:
            with contextlib.suppress(OSError):
                os.kill(self._pid, signal.SIGKILL)
            with contextlib.suppress(OSError):
                os.waitpid(self._pid, 0)
            self._pid = 0
            gc.unfreeze()
        if self._file is not None:
            self._file.close()
