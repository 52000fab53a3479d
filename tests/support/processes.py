"""Real processes for integration tests: free loopback ports, child processes in their own
session (stopped with their whole group), and a Dask scheduler with worker processes."""

from __future__ import annotations

import contextlib
import os
import signal
import socket
import subprocess
import sys
from pathlib import Path

VENV_BIN = Path(sys.executable).parent


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


class Process:
    """A child process in its own session, its output in a log file."""

    def __init__(self, args: list[str], log: Path, env: dict[str, str] | None = None) -> None:
        self.log = log
        self._out = open(log, "wb")  # noqa: SIM115 - closed in stop()
        self.popen = subprocess.Popen(
            args, stdout=self._out, stderr=subprocess.STDOUT, env=env, start_new_session=True
        )

    def alive(self) -> bool:
        return self.popen.poll() is None

    def stop(self, sig: int = signal.SIGTERM, timeout: float = 15.0) -> None:
        """Signal the process group, wait, then kill whatever is left of it."""
        try:
            if self.alive():
                os.killpg(self.popen.pid, sig)
                with contextlib.suppress(subprocess.TimeoutExpired):
                    self.popen.wait(timeout)
            os.killpg(self.popen.pid, signal.SIGKILL)  # stragglers of the group
        except ProcessLookupError:
            pass
        self.popen.wait(timeout)
        self._out.close()

    def tail(self, n: int = 4000) -> str:
        return self.log.read_bytes()[-n:].decode(errors="replace")


def start_dask(
    processes: list[Process], logs: Path, *, workers: int = 2, memory: str = "2GiB"
) -> str:
    """Start `dask scheduler` and `dask worker` processes (one thread each) on loopback; the
    processes join ``processes`` so the caller's fixture stops them. Returns the address."""
    port = free_port()
    address = f"tcp://127.0.0.1:{port}"
    dask = str(VENV_BIN / "dask")
    processes.append(
        Process(
            [dask, "scheduler", "--host", "127.0.0.1", "--port", str(port), "--no-dashboard"],
            logs / "scheduler.log",
        )
    )
    for n in range(workers):
        processes.append(
            Process(
                [
                    dask,
                    "worker",
                    address,
                    "--nthreads",
                    "1",
                    "--no-dashboard",
                    "--memory-limit",
                    memory,
                    "--local-directory",
                    str(logs / f"w{n}"),
                ],
                logs / f"worker{n}.log",
            )
        )
    return address
