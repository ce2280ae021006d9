"""Why the broker connection is down, in words for the log and /healthz, and counted.

A connection that fails for TLS or because the broker refuses it will not heal by retrying, so
it is an error each time; a network failure is a warning. Two instances with one client id
knock each other off: MQTT 5 brokers may say so (DISCONNECT 0x8E, section 3.14.2.1), mosquitto
2.0 just closes the older connection, so a run of connections closed right after connecting is
taken as the sign.
"""

from __future__ import annotations

import logging
import time
from typing import Any

from relay.core.errors import TransportError

__all__ = ["ConnectionDiagnosis"]

_log = logging.getLogger("rehear.service")
# Three connections in a row that the broker closes within 5 s of connecting look like two
# instances with one client id knocking each other off.
_SHORT_SESSION_S = 5.0
_SHORT_SESSIONS_SUSPECT = 3


class ConnectionDiagnosis:
    """Fed with each connection's start and end; ``problem`` says what is wrong now."""

    def __init__(self, metrics: Any, client_id: str) -> None:
        self.metrics = metrics
        self.client_id = client_id
        self.problem = "not connected yet"
        self._connected_at = 0.0
        self._short_sessions = 0

    def connected(self) -> None:
        self._connected_at = time.monotonic()

    def failed(self, exc: TransportError) -> None:
        """A connection attempt failed."""
        self.problem = str(exc)
        if exc.kind in ("tls", "refused"):
            # Not a network blip: retrying alone will not fix it, so it is logged as an error each
            # time (with backoff up to broker.reconnect_max_s) and counted by cause.
            self.metrics.connect_failures.labels(reason=exc.kind).inc()
            _log.error("cannot connect: %s", exc)
        elif exc.kind == "network":
            self.metrics.connect_failures.labels(reason="network").inc()
            _log.warning("broker connection refused or unreachable", extra={"fields": {"error": str(exc)}})
        else:
            _log.warning("reconnecting after a failure", extra={"fields": {"error": str(exc)}})

    def lost(self, exc: Exception, *, taken_over: bool, reason: str) -> None:
        """An established connection ended; ``reason`` is the broker's, when it gave one."""
        short = time.monotonic() - self._connected_at < _SHORT_SESSION_S
        self._short_sessions = self._short_sessions + 1 if short else 0
        if taken_over:
            self.problem = f"session taken over by another client with client_id {self.client_id!r}"
            _log.error("the broker closed the session because another client connected with the same "
                       "client_id %r (reason code 0x8e); every instance needs its own client_id", self.client_id)
        elif self._short_sessions >= _SHORT_SESSIONS_SUSPECT:
            self.problem = f"connection closed {self._short_sessions} times in a row right after connecting"
            _log.error("the broker closed the connection %d times in a row within %g s of connecting: probably "
                       "another client connected with the same client_id %r; every instance needs its own "
                       "client_id", self._short_sessions, _SHORT_SESSION_S, self.client_id)
        else:
            because = f" (reason: {reason})" if reason else ""
            self.problem = f"connection lost: {exc}{because}"
            _log.warning("broker connection lost", extra={"fields": {"error": str(exc) + because}})
