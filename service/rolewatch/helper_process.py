"""Long-lived child interpreters that each serve one kind of request for the closing process.

Some steps of a close run better outside the closing process: igraph's Leiden holds the
global interpreter lock, so only another process can overlap it with the features; and
reading a SQLite window through a second SQLite library (the ADBC driver's) is only safe in
another process, because that library would drop the POSIX file locks of Python's own
``sqlite3`` when it closes the file. A :class:`HelperProcess` is such a child: a fresh
interpreter running one module (``python -m MODULE``), started by its first request and kept
for the next ones (its imports would otherwise count against every close). Unlike
:mod:`multiprocessing`'s "spawn" it never imports the caller's main script, so a script that
closes windows is not run again in the child.

Requests and answers are length-prefixed byte strings on the child's standard input and
output, one exchange at a time. An answer starts with one status byte: the child reports
an error of its own (a request it cannot serve) and keeps running; a child that dies, or
whose answer does not parse, is stopped and the next request starts a new one. Either way
the caller gets an :class:`OSError` and does the work itself.
"""

from __future__ import annotations

import os
import subprocess
import sys
import threading
import traceback
from collections.abc import Callable, Sequence
from typing import IO, Any

__all__ = ["HelperError", "HelperProcess", "serve"]

_OK = b"\x00"
_FAILED = b"\x01"


class HelperError(OSError):
    """The child could not serve a request (its message says why); it keeps running."""


class HelperProcess:
    """The child running ``python -m module``, started on first use and kept."""

    def __init__(self, module: str) -> None:
        self.module = module
        self.process: subprocess.Popen | None = None
        self._lock = threading.Lock()

    def exchange(self, request: Any) -> memoryview:
        """Send one request and wait for its answer (waiting on the pipe releases the GIL);
        the answer is a view of the bytes read, not a copy. ``request`` is one bytes-like
        object or a sequence of them sent back to back as one request (the buffers of
        arrays the caller holds anyway go down the pipe without being joined into a copy);
        a list is emptied once written, so buffers only it holds are let go while the
        answer is awaited. Raises :class:`HelperError` when the child reports a failure and
        :class:`OSError` when it cannot be started or stops answering (it is then stopped)."""
        parts = request if isinstance(request, list | tuple) else [request]
        with self._lock:
            process = self._running()
            try:
                _write_frame(process.stdin, parts)
                if isinstance(request, list):
                    request.clear()
                answer = memoryview(_read_frame(process.stdout))
            except BaseException:
                self._stop(process)
                raise
        if answer[:1] == _OK:
            return answer[1:]
        if answer[:1] == _FAILED:
            raise HelperError(bytes(answer[1:]).decode("utf-8", "replace"))
        with self._lock:
            self._stop(process)
        raise OSError(f"the {self.module} process answered an unknown status")

    def stop(self) -> None:
        """Stop the child (the next request starts a new one)."""
        with self._lock:
            if self.process is not None:
                self._stop(self.process)

    def _running(self) -> subprocess.Popen:
        if self.process is None or self.process.poll() is not None:
            self.process = subprocess.Popen(
                [sys.executable, "-m", self.module], stdin=subprocess.PIPE, stdout=subprocess.PIPE
            )
        return self.process

    def _stop(self, process: subprocess.Popen) -> None:
        if process.poll() is None:
            process.kill()
        process.wait()
        if self.process is process:
            self.process = None


def serve(
    answer: Callable[[bytes], Sequence[Any]], *, after_each: Callable[[], Any] | None = None
) -> None:
    """The child's loop: answer each request on stdin on stdout until stdin ends. ``answer``
    gives the parts of its answer (written one after the other, never joined in memory);
    an exception it raises goes back to the caller as a failure, and the loop goes on.
    ``after_each`` runs once an answer is written (to hand memory back, for example)."""
    requests, answers = sys.stdin.buffer, sys.stdout.buffer
    while True:
        try:
            request = _read_frame(requests)
        except OSError:  # the parent closed the pipe: nothing more to do
            return
        try:
            parts = [_OK, *answer(request)]
        except Exception:  # reported to the parent, which does the work itself
            parts = [_FAILED, traceback.format_exc(limit=3).encode("utf-8")]
        try:
            _write_frame(answers, parts)
        except BrokenPipeError:  # the parent is gone (it died or stopped waiting)
            _quiet_stdout()
            return
        del parts
        if after_each is not None:
            after_each()


def _quiet_stdout() -> None:
    """Point stdout at the null device, so the interpreter's last flush at exit does not
    print a second broken-pipe error (the Python documentation's advice for SIGPIPE)."""
    devnull = os.open(os.devnull, os.O_WRONLY)
    os.dup2(devnull, sys.stdout.fileno())
    os.close(devnull)


def _write_frame(stream: IO[bytes] | None, parts: Sequence[Any]) -> None:
    """One length-prefixed message made of ``parts`` (bytes-like objects)."""
    if stream is None:
        raise OSError("the helper process has no pipes")
    views = [memoryview(part).cast("B") for part in parts]
    stream.write(sum(view.nbytes for view in views).to_bytes(8, "little"))
    for view in views:
        stream.write(view)
    stream.flush()


def _read_frame(stream: IO[bytes] | None) -> bytes:
    """One length-prefixed message; OSError when the stream ends early."""
    if stream is None:
        raise OSError("the helper process has no pipes")
    size = int.from_bytes(_read_exactly(stream, 8), "little")
    return _read_exactly(stream, size)


def _read_exactly(stream: IO[bytes], size: int) -> bytes:
    data = stream.read(size)
    if data is None or len(data) != size:
        raise OSError("the helper process ended its output early")
    return bytes(data)
