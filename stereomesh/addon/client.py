"""The worker client: starts ``PYTHON -m stereomesh worker`` and talks JSON lines to it.

Imports only the standard library, so it loads instantly and can be used (and
tested) outside the editor too. One worker serves a whole editor session; if it
dies, the job that was running fails with a readable message and the next job
starts a fresh worker.
"""

from __future__ import annotations

import itertools
import json
import os
import queue
import subprocess
import sys
import tempfile
import threading
import time

PROTOCOL = 1
HELLO_TIMEOUT = 120.0
CANCEL_GRACE = 5.0
"""Seconds a cancelled job may take to stop before its worker is ended.

The worker stops at its next progress report; a long library call (mesh repair)
reports nothing for many seconds, so past this grace the process is killed and
the next action starts a new one."""


class WorkerError(Exception):
    """A job failed; ``kind`` is ``input``, ``internal``, ``cancelled`` or ``crash``."""

    def __init__(self, kind: str, message: str):
        super().__init__(message)
        self.kind = kind


def clean_environment() -> dict:
    """The editor's environment without ``PYTHON*`` variables.

    The editor may set ``PYTHONPATH``/``PYTHONHOME`` for its own interpreter;
    passed on, they would make the worker's interpreter load the editor's
    packages (and its older numpy) instead of its own.
    """
    return {k: v for k, v in os.environ.items() if not k.upper().startswith("PYTHON")}


class Job:
    """One request: progress, then a result or an error."""

    def __init__(self, client: WorkerClient, job_id: int, action: str):
        self.client = client
        self.id = job_id
        self.action = action
        self.fraction = 0.0
        self.message = "starting the engine"
        self.result: dict | None = None
        self.error: WorkerError | None = None
        self._cancel_at: float | None = None
        self._grace = CANCEL_GRACE

    @property
    def done(self) -> bool:
        return self.result is not None or self.error is not None

    def poll(self) -> bool:
        """Take the messages that arrived; True once the job has finished."""
        self.client._pump(block=False)
        self._enforce_cancel()
        return self.done

    def _enforce_cancel(self) -> None:
        if self.done or self._cancel_at is None:
            return
        if time.monotonic() - self._cancel_at > self._grace:
            self.client.kill()
            self.error = WorkerError("cancelled", "cancelled (the engine was stopped; the "
                                     "next action starts a new one)")

    def wait(self, on_progress=None, timeout: float | None = None) -> dict:
        """Block until the job ends; returns the result or raises :class:`WorkerError`."""
        t_end = None if timeout is None else time.monotonic() + timeout
        last = None
        while not self.done:
            self.client._pump(block=True, timeout=0.25)
            self._enforce_cancel()
            if on_progress is not None and (self.fraction, self.message) != last:
                last = (self.fraction, self.message)
                on_progress(self.fraction, self.message)
            if t_end is not None and time.monotonic() > t_end and not self.done:
                self.cancel()
                raise WorkerError("internal", f"{self.action}: no answer within {timeout} s")
        if self.error is not None:
            raise self.error
        return self.result

    def cancel(self, grace: float = CANCEL_GRACE) -> None:
        """Ask the worker to stop this job; end the worker if it takes over ``grace`` s."""
        if self.done or self._cancel_at is not None:
            return
        self._cancel_at, self._grace = time.monotonic(), grace
        try:
            self.client._send({"action": "cancel", "id": self.id})
        except OSError:
            pass  # already gone: the job fails as a crash


class WorkerClient:
    """A running worker process and the jobs sent to it.

    Parameters
    ----------
    python : str
        Interpreter that has stereomesh installed.
    """

    _ids = itertools.count(1)

    def __init__(self, python: str):
        self.python = python
        self.proc: subprocess.Popen | None = None
        self.hello: dict = {}
        self.warm_message = ""
        self.ready = False
        self._messages: queue.Queue = queue.Queue()
        self._jobs: dict[int, Job] = {}
        self._log_path = ""

    # process ---------------------------------------------------------------------------
    def alive(self) -> bool:
        return self.proc is not None and self.proc.poll() is None

    @property
    def pid(self) -> int | None:
        return self.proc.pid if self.proc is not None else None

    def start(self) -> None:
        """Start the worker and wait for its handshake (the import of the core only)."""
        if not self.python or not os.path.isfile(self.python):
            raise WorkerError("input", f"Python interpreter {self.python!r} not found; set it "
                              "in the add-on's preferences")
        fd, self._log_path = tempfile.mkstemp(prefix="stereomesh-worker-", suffix=".log")
        # No shell, a list of arguments, a neutral working folder: portable and unaffected
        # by spaces or quotes in the paths.
        flags = subprocess.CREATE_NO_WINDOW if sys.platform == "win32" else 0
        self.proc = subprocess.Popen(
            [self.python, "-m", "stereomesh", "worker"],
            stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=fd,
            env=clean_environment(), cwd=tempfile.gettempdir(), text=True,
            encoding="utf-8", bufsize=1, creationflags=flags,
        )
        os.close(fd)
        threading.Thread(target=self._read, args=(self.proc,), daemon=True,
                         name="stereomesh-worker-reader").start()
        t_end = time.monotonic() + HELLO_TIMEOUT
        while not self.hello:
            try:
                msg = self._messages.get(timeout=max(0.0, t_end - time.monotonic()))
            except queue.Empty:
                self.stop()
                raise WorkerError("crash", "the engine did not answer within "
                                  f"{HELLO_TIMEOUT:.0f} s{self._log_tail()}") from None
            if msg.get("type") == "exit":
                raise WorkerError("crash", f"{self.python} could not start the engine "
                                  f"(exit code {msg.get('code')}){self._log_tail()}")
            if msg.get("type") == "hello":
                self.hello = msg
        if self.hello.get("protocol") != PROTOCOL:
            self.stop()
            raise WorkerError("input", f"the engine at {self.python} speaks protocol "
                              f"{self.hello.get('protocol')}, this add-on {PROTOCOL}; "
                              "install matching versions")

    def stop(self, timeout: float = 5.0) -> None:
        """Ask the worker to leave; kill it if it does not."""
        if self.proc is None:
            return
        if self.proc.poll() is None:
            try:
                self._send({"action": "shutdown"})
                self.proc.stdin.close()
                self.proc.wait(timeout)
            except (OSError, subprocess.TimeoutExpired, ValueError):
                self.proc.kill()
                self.proc.wait()
        if self.proc.returncode == 0 and self._log_path:  # a crash's log stays for reading
            try:
                os.remove(self._log_path)
            except OSError:
                pass

    def kill(self) -> None:
        """End the worker at once (a cancel it did not honour in time)."""
        if self.alive():
            self.proc.kill()
            self.proc.wait()

    def _read(self, proc) -> None:
        for line in proc.stdout:
            try:
                self._messages.put(json.loads(line))
            except ValueError:
                print(f"stereomesh: stray worker output: {line.rstrip()}", file=sys.stderr)
        proc.wait()
        self._messages.put({"type": "exit", "code": proc.returncode})

    def _log_tail(self, lines: int = 6) -> str:
        try:
            with open(self._log_path, encoding="utf-8", errors="replace") as fh:
                tail = [ln.rstrip() for ln in fh.readlines()[-lines:] if ln.strip()]
        except OSError:
            return ""
        return (" — last log lines: " + " | ".join(tail)) if tail else ""

    # jobs ------------------------------------------------------------------------------
    def busy(self) -> Job | None:
        return next((j for j in self._jobs.values() if not j.done), None)

    def submit(self, action: str, args: dict, params: dict | None = None) -> Job:
        """Send a request; returns its :class:`Job` at once."""
        job = Job(self, next(self._ids), action)
        self._jobs[job.id] = job
        if not self.ready:
            job.message = self.warm_message or "starting the engine"
        try:
            self._send({"id": job.id, "action": action, "args": args, "params": params or {}})
        except OSError as exc:
            job.error = WorkerError("crash", f"the engine stopped before the request: {exc}")
        return job

    def _send(self, message: dict) -> None:
        if not self.alive():
            raise OSError("the engine is not running")
        self.proc.stdin.write(json.dumps(message) + "\n")
        self.proc.stdin.flush()

    def _pump(self, block: bool, timeout: float = 0.0) -> None:
        """Route the messages that arrived to their jobs."""
        while True:
            try:
                msg = self._messages.get(block=block, timeout=timeout if block else None)
            except queue.Empty:
                return
            block = False
            kind = msg.get("type")
            job = self._jobs.get(msg.get("id"))
            if kind == "exit":
                for j in self._jobs.values():
                    if not j.done:
                        j.error = WorkerError(
                            "crash", f"the engine stopped unexpectedly (exit code "
                            f"{msg.get('code')}) during {j.action}; the next action starts "
                            f"a new one (log: {self._log_path}){self._log_tail()}")
                continue
            if kind == "progress" and msg.get("id") is None:
                self.warm_message = msg.get("message", "")
                for j in self._jobs.values():
                    if not j.done:
                        j.message = self.warm_message
                continue
            if kind == "ready":
                self.ready = True
                continue
            if job is None:
                continue
            if kind == "progress":
                job.fraction = float(msg.get("fraction", 0.0))
                job.message = msg.get("message") or msg.get("step", "")
            elif kind == "result":
                job.result = msg
            elif kind == "error":
                job.error = WorkerError(msg.get("kind", "internal"), msg.get("message", ""))


_client: WorkerClient | None = None


def get_client(python: str) -> WorkerClient:
    """The session's worker, started (again) when missing, dead or for another interpreter."""
    global _client
    if _client is not None and (not _client.alive() or _client.python != python):
        _client.stop()
        _client = None
    if _client is None:
        client = WorkerClient(python)
        client.start()
        _client = client
    return _client


def current_client() -> WorkerClient | None:
    """The running worker, if any (for status display and tests)."""
    return _client


def shutdown() -> None:
    """Stop the session's worker (add-on disabled or editor closing)."""
    global _client
    if _client is not None:
        _client.stop()
        _client = None
