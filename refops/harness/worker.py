"""A worker process that runs subjects, so that a crash inside a native kernel is a verdict.

The worker loads the TARGET once and then serves one case per message. If it dies (a segfault,
an abort, heap corruption) or a case runs past the time limit, the parent reports that case and
starts a fresh worker for the next one.
"""
from __future__ import annotations

import multiprocessing
from typing import Any


def _serve(connection, target: str) -> None:
    from .subject import load_factory, run_subject
    import torch
    torch.set_num_threads(1)
    try:
        factory = load_factory(target)
    except Exception as error:
        connection.send({"ready": False, "error": str(error)})
        return
    connection.send({"ready": True})
    while True:
        job = connection.recv()
        if job is None:
            return
        connection.send(run_subject(factory, job))


class Worker:
    """Runs jobs in a child process; ``run`` returns the subject's result or a fault record."""

    START_TIMEOUT = 120.0

    def __init__(self, target: str, timeout: float):
        self.target, self.timeout = target, timeout
        self._context = multiprocessing.get_context("spawn")
        self._process = None

    def _start(self) -> None:
        parent, child = self._context.Pipe()
        self._process = self._context.Process(target=_serve, args=(child, self.target), daemon=True)
        self._process.start()
        child.close()
        self._connection = parent
        if not parent.poll(self.START_TIMEOUT):
            self.close()
            raise RuntimeError("the worker process did not start")
        hello = parent.recv()
        if not hello["ready"]:
            self.close()
            raise RuntimeError(hello["error"])

    def run(self, job: dict) -> dict[str, Any]:
        if self._process is None or not self._process.is_alive():
            self._start()
        try:
            self._connection.send(job)
            if not self._connection.poll(self.timeout):
                self.close()
                return {"fault": "timeout",
                        "error": f"the subject ran past the time limit of {self.timeout:g} s"}
            return self._connection.recv()
        except (EOFError, BrokenPipeError, ConnectionResetError):
            code = self._process.exitcode if self._process is not None else None
            self.close()
            return {"fault": "aborted", "error": f"the subject aborted the process (exit code {code})"}

    def close(self) -> None:
        if self._process is not None:
            if self._process.is_alive():
                self._process.kill()
            self._process.join(5)
        self._process = None
