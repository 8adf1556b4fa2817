"""A real uvicorn server on 127.0.0.1 and a free port, in a thread (for tests that need real sockets)."""

from __future__ import annotations

import contextlib
import socket
import threading
import time
from collections.abc import Iterator


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@contextlib.contextmanager
def live_server(settings) -> Iterator[str]:
    """Serve ``create_app(settings)`` on 127.0.0.1 (the port is ``settings.port`` when set, else free)."""
    import uvicorn

    from pellucid.web.app import create_app

    port = settings.port if settings.port not in (0, 8000) else free_port()
    # proxy_headers=False as `pellucid serve` runs it: the client address is the socket's.
    config = uvicorn.Config(create_app(settings), host="127.0.0.1", port=port, log_level="warning",
                            lifespan="on", proxy_headers=False)
    server = uvicorn.Server(config)
    thread = threading.Thread(target=server.run, daemon=True)
    thread.start()
    deadline = time.time() + 30
    while not server.started:
        if time.time() > deadline or not thread.is_alive():
            raise RuntimeError("uvicorn did not start within 30 s")
        time.sleep(0.05)
    try:
        yield f"http://127.0.0.1:{port}"
    finally:
        server.should_exit = True
        thread.join(timeout=30)
