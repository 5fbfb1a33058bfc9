"""Settings of one running desk, and the error type its pages show."""
from __future__ import annotations

import ipaddress
from dataclasses import dataclass
from pathlib import Path

from ..errors import BayesbaseError

__all__ = ["DeskConfig", "DeskError", "DEFAULT_MAX_UPLOAD_MB", "DEFAULT_PORT", "LOOPBACK_HOSTS",
           "is_loopback"]

#: default upload limit in megabytes (MB = 2**20 bytes here)
DEFAULT_MAX_UPLOAD_MB = 50
DEFAULT_PORT = 8765
#: names a browser on this machine uses for a server bound to the loopback interface
LOOPBACK_HOSTS = ("127.0.0.1", "localhost", "::1")


def is_loopback(host: str) -> bool:
    """True for a host name or address that only this machine can reach."""
    host = str(host).strip().strip("[]")
    if host.lower() == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


@dataclass(frozen=True)
class DeskConfig:
    """One desk: the store it serves and how it is guarded.

    ``token``: required on every request when set (``bayesbase serve`` sets a random one for a
    host other than loopback). ``allowed_hosts``: the Host header names accepted (None: any);
    on loopback this refuses a page that reaches the desk through another name (DNS
    rebinding). ``packs_dir``: a folder of pack TOML files (full packs or fragments, such as
    calibrated ones) shown beside the built-in packs.
    ``cache_size``: assessments kept per patient and settings (0 keeps none).
    """

    db: Path
    token: str | None = None
    max_upload_bytes: int = DEFAULT_MAX_UPLOAD_MB * 1024 * 1024
    packs_dir: Path | None = None
    allowed_hosts: tuple[str, ...] | None = LOOPBACK_HOSTS
    cache_size: int = 16
    page_size: int = 50
    staging_dir: Path | None = None

    @property
    def max_upload_mb(self) -> float:
        return self.max_upload_bytes / (1024 * 1024)


class DeskError(BayesbaseError):
    """A request the desk refuses or cannot answer: shown as a page with this status."""

    def __init__(self, status: int, title: str, message: str = ""):
        self.status = int(status)
        self.title = title
        self.message = message
        super().__init__(f"{title}: {message}" if message else title)
