"""Run the REST service for a while on loopback (the demo, tests, benchmarks, notebooks).

:func:`running_service` starts uvicorn on a free loopback port in a background thread of this
process; :func:`serve_process` runs ``dipshape serve`` as a child process (with its own worker
processes). Both wait until the model is loaded, yield the base URL and stop the server on exit.
"""

from __future__ import annotations

import contextlib
import os
import signal
import socket
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Callable, Iterator, Mapping, Sequence
from pathlib import Path

import httpx
import uvicorn

from service.app import create_app
from service.errors import ServiceError
from service.settings import ServiceSettings

__all__ = ["ServedProcess", "free_loopback_port", "memory_mb", "process_tree",
           "running_service", "serve_process"]


def free_loopback_port() -> int:
    """A TCP port free on 127.0.0.1 at the time of the call (the OS picks it)."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@contextlib.contextmanager
def running_service(settings: ServiceSettings, *, ready_timeout_s: float = 60.0
                    ) -> Iterator[str]:
    """Serve ``settings``'s app on loopback while the block runs.

    Parameters
    ----------
    settings : ServiceSettings
        Its ``host`` and ``port`` are replaced by 127.0.0.1 and a free port.
    ready_timeout_s : float
        How long to wait for ``/readyz`` [s].

    Yields
    ------
    str
        The base URL, e.g. ``http://127.0.0.1:50123``.

    Raises
    ------
    ServiceError
        ``model_not_ready`` when the service does not become ready in time (e.g. no model).
    """
    port = free_loopback_port()
    settings = settings.model_copy(update={"host": "127.0.0.1", "port": port})
    config = uvicorn.Config(create_app(settings), host="127.0.0.1", port=port,
                            log_level="warning", lifespan="on")
    server = uvicorn.Server(config)
    thread = threading.Thread(target=server.run, name="dipshape-service", daemon=True)
    thread.start()
    base = f"http://127.0.0.1:{port}"
    try:
        _wait_ready(base, ready_timeout_s,
                    gone=lambda: None if thread.is_alive() else "the server thread stopped")
        yield base
    finally:
        server.should_exit = True
        thread.join(timeout=30)


class ServedProcess:
    """A running ``dipshape serve`` child: its base URL and process."""

    def __init__(self, base_url: str, process: subprocess.Popen[bytes]) -> None:
        self.base_url = base_url
        self.process = process

    @property
    def pid(self) -> int:
        """The pid of the ``dipshape serve`` process (its uvicorn workers are children)."""
        return self.process.pid

    def process_tree(self) -> list[int]:
        """The server's pid and all its descendants, parents first (Linux ``/proc``)."""
        return process_tree(self.pid)


def process_tree(pid: int) -> list[int]:
    """``pid`` and all its descendants, parents first (``/proc/<pid>/task/*/children``)."""
    out = [pid]
    for task in sorted(Path(f"/proc/{pid}/task").glob("*")):
        try:
            kids = [int(x) for x in (task / "children").read_text().split()]
        except OSError:
            continue
        for kid in kids:
            out += process_tree(kid)
    return out


def memory_mb(pid: int, field: str = "VmRSS") -> float:
    """A memory figure of a process [MB] from ``/proc/<pid>/status`` (Linux ``proc(5)``):
    ``VmRSS`` resident now, ``VmHWM`` peak resident; NaN once the process is gone."""
    try:
        for line in Path(f"/proc/{pid}/status").read_text().splitlines():
            if line.startswith(f"{field}:"):
                return int(line.split()[1]) / 1024
    except OSError:
        pass
    return float("nan")


@contextlib.contextmanager
def serve_process(
    registry: Path,
    *,
    workers: int = 1,
    env: Mapping[str, str] | None = None,
    extra_args: Sequence[str] = (),
    db: Path | None = None,
    ready_timeout_s: float = 60.0,
    stop_timeout_s: float = 20.0,
) -> Iterator[ServedProcess]:
    """Run ``dipshape serve`` as a child process on a free loopback port while the block runs.

    Parameters
    ----------
    registry : Path
        Model registry folder.
    workers : int
        uvicorn worker processes.
    env : Mapping, optional
        ``DIPSHAPE_*`` settings for the server; the caller's own ``DIPSHAPE_*`` variables are
        not passed on, so only these apply.
    extra_args : sequence of str
        More ``dipshape serve`` options.
    db : Path, optional
        The label store (default: a temporary file removed afterwards).
    ready_timeout_s, stop_timeout_s : float
        How long to wait for ``/readyz``, and for the server to stop after SIGTERM before it is
        killed [s].

    Yields
    ------
    ServedProcess

    Raises
    ------
    ServiceError
        ``model_not_ready`` when the server exits early or is not ready in time (its log is in
        the detail).
    """
    clean = {k: v for k, v in os.environ.items() if not k.startswith("DIPSHAPE_")}
    port = free_loopback_port()
    base = f"http://127.0.0.1:{port}"
    with tempfile.TemporaryDirectory(prefix="dipshape-serve-") as tmp:
        log_path = Path(tmp) / "serve.log"
        with log_path.open("wb") as log:
            process = subprocess.Popen(
                [str(Path(sys.executable).parent / "dipshape"), "serve", "--host", "127.0.0.1",
                 "--port", str(port), "--workers", str(workers), "--registry", str(registry),
                 "--db", str(db or Path(tmp) / "store.sqlite"), *extra_args],
                env={**clean, **(env or {})}, stdout=subprocess.DEVNULL, stderr=log)
        try:
            _wait_ready(base, ready_timeout_s, gone=lambda: None if process.poll() is None else (
                f"dipshape serve exited ({process.returncode}): "
                + log_path.read_text(errors="replace")[-2000:]))
            yield ServedProcess(base, process)
        finally:
            # SIGTERM, not SIGINT: a background job of a non-interactive shell (a CI runner)
            # starts with SIGINT ignored (POSIX), and its children inherit that
            process.send_signal(signal.SIGTERM)
            try:
                process.wait(timeout=stop_timeout_s)
            except subprocess.TimeoutExpired:
                process.kill()
                process.wait()


def _wait_ready(base: str, timeout_s: float, *, gone: Callable[[], str | None]) -> None:
    """Poll ``/readyz`` until it answers 200.

    The lifespan loads the model before the first answer, so a first 503 means there is no
    model now and will be none later: refused at once. ``gone`` returns why the server is no
    longer running (None while it runs).
    """
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        reason = gone()
        if reason is not None:
            raise ServiceError("model_not_ready", f"the service at {base} is not running: "
                               f"{reason}")
        try:
            answer = httpx.get(base + "/readyz", timeout=5.0)
        except httpx.TransportError:
            time.sleep(0.1)
            continue
        if answer.status_code == 200:
            return
        raise ServiceError("model_not_ready", f"the service at {base} has no model: "
                           f"{answer.text[:300]}; is there an active model in the registry?")
    raise ServiceError("model_not_ready", f"the service at {base} was not ready within "
                       f"{timeout_s:g} s")
