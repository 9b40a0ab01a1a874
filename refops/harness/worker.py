"""A worker process that runs subjects, so that a crash inside a native kernel is a verdict.

The worker (``python -m refops.harness.worker TARGET``) loads the TARGET once and then serves one
batch of cases per message (one reply per case, sent as soon as it is done): length-prefixed
pickles over its stdin and a private copy of its stdout (the subject's own prints go to stderr).
It is a fresh interpreter, so the caller's main script is never re-run. If the worker dies (a
segfault, an abort, heap corruption) or a case runs past the time limit, the parent reports that
case and starts a fresh worker for the next one. With TARGET :data:`JUDGE` the worker runs no
subject: it judges cases (oracle and comparisons) for a sweep over several lanes.
"""
from __future__ import annotations

import os
import pickle
import select
import struct
import subprocess
import sys
from typing import Any, BinaryIO

_HEADER = struct.Struct("<Q")


def _send(stream: BinaryIO, message: Any) -> None:
    payload = pickle.dumps(message, protocol=pickle.HIGHEST_PROTOCOL)
    data = memoryview(_HEADER.pack(len(payload)) + payload)
    while data:  # an unbuffered stream may take part of it
        data = data[stream.write(data):]
    stream.flush()


def _read_exactly(stream: BinaryIO, size: int) -> bytes:
    data = b""
    while len(data) < size:
        chunk = stream.read(size - len(data))
        if not chunk:
            raise EOFError("the worker closed its output")
        data += chunk
    return data


def _receive(stream: BinaryIO) -> Any:
    (size,) = _HEADER.unpack(_read_exactly(stream, _HEADER.size))
    return pickle.loads(_read_exactly(stream, size))


JUDGE = "--judge"
"""The TARGET of a worker that runs no subject but judges cases (the oracle and the comparisons),
so that a sweep over several cores is not held back by one process judging for all."""


def _judge(job: dict) -> tuple:
    from .. import ops
    from .runner import judge
    return judge(ops.get(job["op"]), job["case"], job["result"], job["dtype"], job["model"],
                 job["use_deviations"])


def _handler(target: str):
    """The function that serves one job of this worker."""
    if target == JUDGE:
        return _judge
    from .subject import load_factory, run_subject
    import torch
    torch.set_num_threads(1)
    factory = load_factory(target)
    return lambda job: run_subject(factory, job)


def _serve(target: str) -> None:
    replies = os.fdopen(os.dup(1), "wb")
    os.dup2(2, 1)  # the subject's prints must not reach the protocol stream
    requests = sys.stdin.buffer
    try:
        handle = _handler(target)
    except Exception as error:
        _send(replies, {"ready": False, "error": str(error)})
        return
    _send(replies, {"ready": True})
    while True:
        try:
            jobs = _receive(requests)
        except EOFError:
            return
        for job in jobs:
            _send(replies, handle(job))


class Worker:
    """Runs jobs in a child process; ``run`` returns the subject's result or a fault record."""

    START_TIMEOUT = 120.0

    def __init__(self, target: str, timeout: float):
        self.target, self.timeout = target, timeout
        self._process: subprocess.Popen | None = None

    def _wait_readable(self, seconds: float) -> bool:
        ready, _, _ = select.select([self._process.stdout], [], [], seconds)
        return bool(ready)

    def _start(self) -> None:
        # Unbuffered: ``select`` sees the pipe, so no reply may sit unread in a reader's buffer.
        self._process = subprocess.Popen([sys.executable, "-m", "refops.harness.worker", self.target],
                                         stdin=subprocess.PIPE, stdout=subprocess.PIPE, cwd=os.getcwd(),
                                         bufsize=0)
        if not self._wait_readable(self.START_TIMEOUT):
            self.close()
            raise RuntimeError("the worker process did not start")
        try:
            hello = _receive(self._process.stdout)
        except EOFError:
            self.close()
            raise RuntimeError("the worker process exited while starting") from None
        if not hello["ready"]:
            self.close()
            raise RuntimeError(hello["error"])

    def run(self, job: dict) -> dict[str, Any]:
        return self.run_many([job])[0]

    def run_many(self, jobs: list[dict]) -> list[dict[str, Any]]:
        """Results of ``jobs`` in order. A case that hangs or takes the worker down gets a fault
        record; a fresh worker then runs the cases after it. A job marked ``isolate`` runs alone
        and its worker is discarded after it."""
        results: list[dict[str, Any]] = []
        while len(results) < len(jobs):
            rest = jobs[len(results):]
            if rest[0].get("isolate"):  # alone in a fresh worker: it may corrupt the process
                results.extend(self._run_until_fault(rest[:1]))
                self.close()
                continue
            upto = next((i for i, job in enumerate(rest) if job.get("isolate")), len(rest))
            results.extend(self._run_until_fault(rest[:upto]))
        return results

    def _run_until_fault(self, jobs: list[dict]) -> list[dict[str, Any]]:
        if self._process is None or self._process.poll() is not None:
            self._start()
        results: list[dict[str, Any]] = []
        try:
            _send(self._process.stdin, jobs)
            for _ in jobs:
                if not self._wait_readable(self.timeout):
                    self.close()
                    return results + [{"fault": "timeout",
                                       "error": f"the subject ran past the time limit of {self.timeout:g} s"}]
                results.append(_receive(self._process.stdout))
            return results
        except (EOFError, BrokenPipeError, ConnectionResetError):
            code = self._process.wait(5)
            self.close()
            return results + [{"fault": "aborted", "error": f"the subject aborted the process (exit code {code})"}]

    def close(self) -> None:
        if self._process is not None:
            if self._process.poll() is None:
                self._process.kill()
            self._process.wait(5)
            for stream in (self._process.stdin, self._process.stdout):
                stream.close()
        self._process = None


if __name__ == "__main__":
    _serve(sys.argv[1])
