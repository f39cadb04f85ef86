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
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import IO

__all__ = ["ChildTask", "can_fork", "suspended"]

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

    With ``parts=2`` the child writes two results: ``work(first, second, handover)`` calls
    ``handover()`` once ``first`` is complete, and :meth:`first` gives that file as soon as it is
    (the child goes on with ``second``, which :meth:`result` gives at the end).

    >>> def work(first, second, handover):
    ...     first.write(b"early")
    ...     handover()
    ...     second.write(b"late")
    >>> with ChildTask(work, parts=2) as task:
    ...     early, late = task.first(), task.result()
    ...     texts = (early.read(), late.read()) if early and late else (b"early", b"late")
    >>> texts
    (b'early', b'late')
    """

    def __init__(
        self,
        work: Callable[..., None],
        folder: str | Path | None = None,
        *,
        parts: int = 1,
    ):
        if parts not in (1, 2):
            raise ValueError("a child task has one or two parts")
        self._work = work
        self._folder = folder
        self._parts = parts
        self._pid = 0
        self._status: int | None = None  # the child's exit code, once waited for
        self._files: list[IO[bytes]] = []
        self._signal = -1  # read end of the pipe on which the child hands the first part over
        self._handed = False
        self._handover_end = -1  # the child's write end of that pipe

    def __enter__(self) -> ChildTask:
        return self.start()

    def start(self) -> ChildTask:
        """Fork the child (where possible); :meth:`close` must follow, as ``with`` does."""
        if not can_fork():
            return self
        write_end = -1
        try:
            self._files = [tempfile.TemporaryFile(dir=self._folder) for _ in range(self._parts)]
            if self._parts == 2:
                self._signal, write_end = os.pipe()
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
            for end in (self._signal, write_end):
                if end >= 0:
                    os.close(end)
            self._signal = -1
            return self
        if self._pid == 0:
            gc.disable()
            self._handover_end = write_end
            self._run_child()
        if write_end >= 0:
            os.close(write_end)
        return self

    def _run_child(self) -> None:
        status = 1
        try:
            if self._parts == 1:
                self._work(self._files[0])
            else:
                os.close(self._signal)

                def handover() -> None:
                    self._files[0].flush()
                    os.write(self._handover_end, b"1")

                self._work(*self._files, handover)
            for file in self._files:
                file.flush()
            status = 0
        finally:
            os._exit(status)

    def first(self) -> IO[bytes] | None:
        """With ``parts=2``: the first file, rewound, once the child has handed it over (the
        child may still be running); None if there was no child or it ended without."""
        if self._parts != 2 or not self._files:
            return None
        if not self._handed and self._signal >= 0:
            try:
                self._handed = os.read(self._signal, 1) == b"1"  # b"": the child ended first
            except OSError:
                self._handed = False
            os.close(self._signal)
            self._signal = -1
        if not self._handed:
            return None
        self._files[0].seek(0)
        return self._files[0]

    def result(self) -> IO[bytes] | None:
        """The child's (last) file, rewound, if it finished successfully; else None."""
        if not self._files:
            return None
        if self._pid:
            pid, self._pid = self._pid, 0
            _, status = os.waitpid(pid, 0)
            gc.unfreeze()
            self._status = os.waitstatus_to_exitcode(status)
        if self._status != 0:
            return None
        self._files[-1].seek(0)
        return self._files[-1]

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        """Stop a child still running, and close the files (again: a no-op)."""
        if self._pid:
            with contextlib.suppress(OSError):
                os.kill(self._pid, signal.SIGKILL)
            with contextlib.suppress(OSError):
                os.waitpid(self._pid, 0)
            self._pid = 0
            gc.unfreeze()
        if self._signal >= 0:
            os.close(self._signal)
            self._signal = -1
        for file in self._files:
            file.close()


@contextlib.contextmanager
def suspended() -> Iterator[None]:
    """No new child within (a process already sharing the cores with one does all its work
    itself)."""
    global ENABLED
    before, ENABLED = ENABLED, False
    try:
        yield
    finally:
        ENABLED = before
