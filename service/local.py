"""Run the REST service inside this process for a while (the demo, tests, notebooks).

:func:`running_service` starts uvicorn on a free loopback port in a background thread, waits
until the model is loaded, yields the base URL and stops the server on exit.
"""

from __future__ import annotations

import contextlib
import socket
import threading
import time
from collections.abc import Iterator

import httpx
import uvicorn

from service.app import create_app
from service.errors import ServiceError
from service.settings import ServiceSettings

__all__ = ["free_loopback_port", "running_service"]


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
        deadline = time.monotonic() + ready_timeout_s
        while True:
            try:
                answer = httpx.get(base + "/readyz", timeout=2.0)
                if answer.status_code == 200:
                    break
                # the lifespan loads the model before the first answer: no model now, none later
                raise ServiceError("model_not_ready", f"the service at {base} has no model: "
                                   f"{answer.json().get('detail', answer.text)}; is there an "
                                   "active model in the registry?")
            except httpx.TransportError:
                pass
            if time.monotonic() > deadline or not thread.is_alive():
                raise ServiceError("model_not_ready", f"the service at {base} was not ready "
                                   f"within {ready_timeout_s:g} s (is there an active model?)")
            time.sleep(0.1)
        yield base
    finally:
        server.should_exit = True
        thread.join(timeout=30)
