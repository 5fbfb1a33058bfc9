"""Starting the desk: the socket is bound here (so a port in use is a clear error, and port 0
picks a free one), then uvicorn serves the app on it until Ctrl-C. Nothing here prints: the
command (:mod:`bayesbase.cli.serve_cmd`) prints the address it is given."""
from __future__ import annotations

import socket
from dataclasses import dataclass
from pathlib import Path

from ..errors import BayesbaseError
from .config import DEFAULT_MAX_UPLOAD_MB, LOOPBACK_HOSTS, DeskConfig, is_loopback
from .security import new_token

__all__ = ["Plan", "plan", "bind", "run"]


@dataclass(frozen=True)
class Plan:
    """A desk about to start: its config, the bound socket and the address to open."""

    config: DeskConfig
    sock: socket.socket
    url: str

    @property
    def port(self) -> int:
        return self.sock.getsockname()[1]


def bind(host: str, port: int) -> socket.socket:
    """A listening TCP socket on (host, port); BayesbaseError when it cannot be had."""
    try:
        infos = socket.getaddrinfo(host, port, type=socket.SOCK_STREAM)
    except socket.gaierror as exc:
        raise BayesbaseError(f"cannot serve on host {host!r}: {exc}") from exc
    family, _, _, _, address = infos[0]
    sock = socket.socket(family, socket.SOCK_STREAM)
    try:
        sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        sock.bind(address)
        sock.listen(128)
    except OSError as exc:
        sock.close()
        raise BayesbaseError(f"cannot listen on {host}:{port} ({exc.strerror or exc}); "
                             "choose another port with --port") from exc
    sock.set_inheritable(True)
    return sock


def _url_host(host: str) -> str:
    return f"[{host}]" if ":" in host else host


def plan(db, host: str = "127.0.0.1", port: int = 8765, *,
         max_upload_mb: float = DEFAULT_MAX_UPLOAD_MB, packs_dir=None) -> Plan:
    """Bind the socket and make the desk's config: a random access token (in the URL) when
    ``host`` is not loopback; on loopback only the loopback names are accepted as Host."""
    if not (max_upload_mb > 0):
        raise BayesbaseError("--max-upload-mb must be greater than 0")
    if packs_dir is not None and not Path(packs_dir).is_dir():
        raise BayesbaseError(f"--packs: {packs_dir} is not a folder")
    loopback = is_loopback(host)
    token = None if loopback else new_token()
    sock = bind(host, port)
    config = DeskConfig(db=Path(db).expanduser(), token=token,
                        max_upload_bytes=int(max_upload_mb * 1024 * 1024),
                        packs_dir=Path(packs_dir) if packs_dir else None,
                        allowed_hosts=LOOPBACK_HOSTS if loopback else None)
    url = f"http://{_url_host(host)}:{sock.getsockname()[1]}/"
    if token:
        url += f"?token={token}"
    return Plan(config, sock, url)


def run(p: Plan, on_ready=None) -> None:
    """Serve until interrupted (Ctrl-C: uvicorn finishes the requests in flight and returns).
    ``on_ready`` is called once the server accepts requests."""
    import uvicorn

    from .app import create_app

    config = uvicorn.Config(create_app(p.config), log_level="warning", access_log=False,
                            server_header=False, lifespan="on")
    server = uvicorn.Server(config)
    if on_ready is not None:
        original = server.startup

        async def startup(sockets=None):
            await original(sockets=sockets)
            on_ready()

        server.startup = startup
    try:
        server.run(sockets=[p.sock])
    finally:
        p.sock.close()
