"""TLS and credentials for the broker connection, from the ``broker`` settings.

Relative paths are taken from the configuration's folder, as every other file the
configuration names.
"""

from __future__ import annotations

import ssl
from pathlib import Path
from typing import Any

from relay.core.errors import ConfigError
from relay.core.settings import BrokerSettings, TlsSettings

__all__ = ["ClosingContext", "broker_password", "tls_context"]

_VERSIONS = {"1.2": ssl.TLSVersion.TLSv1_2, "1.3": ssl.TLSVersion.TLSv1_3}


def _path(path: Path, base_dir: Path) -> Path:
    path = path.expanduser()
    return path if path.is_absolute() else base_dir / path


class ClosingContext(ssl.SSLContext):
    """An SSLContext that remembers the last socket it wrapped.

    paho (2.2) wraps the TCP socket and runs the handshake in one step; when the handshake fails
    (an unknown CA, a wrong host name) the wrapped socket is left open for the garbage collector.
    The session closes it with ``close_failed``.
    """

    last_socket: ssl.SSLSocket | None = None

    def wrap_socket(self, *args: Any, **kwargs: Any) -> ssl.SSLSocket:
        self.last_socket = super().wrap_socket(*args, **kwargs)
        return self.last_socket

    def close_failed(self) -> None:
        if self.last_socket is not None:
            self.last_socket.close()
            self.last_socket = None


def tls_context(settings: TlsSettings, base_dir: Path) -> ClosingContext | None:
    """An SSLContext that verifies the broker (and presents a client certificate when given);
    None when TLS is off. ConfigError naming the setting when a file cannot be used."""
    if not settings.enabled:
        return None
    context = ClosingContext(ssl.PROTOCOL_TLS_CLIENT)
    context.minimum_version = _VERSIONS[settings.min_version]
    if settings.max_version is not None:
        context.maximum_version = _VERSIONS[settings.max_version]
    context.check_hostname = settings.check_hostname
    context.verify_mode = ssl.CERT_REQUIRED  # never optional: an unverified broker could read every message
    try:
        if settings.ca_file is not None:
            context.load_verify_locations(cafile=str(_path(settings.ca_file, base_dir)))
        else:
            context.load_default_certs(ssl.Purpose.SERVER_AUTH)
        if settings.cert_file is not None and settings.key_file is not None:
            context.load_cert_chain(str(_path(settings.cert_file, base_dir)), str(_path(settings.key_file, base_dir)))
    except (OSError, ssl.SSLError) as exc:
        raise ConfigError("Invalid TLS settings", [f"broker.tls: {exc}"]) from None
    return context


def broker_password(settings: BrokerSettings, base_dir: Path) -> str | None:
    """``broker.password``, or the first line of ``broker.password_file``."""
    if settings.password is not None:
        return settings.password.get_secret_value()
    if settings.password_file is None:
        return None
    path = _path(settings.password_file, base_dir)
    try:
        lines = path.read_text(encoding="utf-8").splitlines()
    except OSError as exc:
        raise ConfigError("Invalid broker settings", [f"broker.password_file: cannot read {path}: {exc.strerror}"]) from None
    return lines[0] if lines else ""
