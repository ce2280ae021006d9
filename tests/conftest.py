"""Shared fixtures: a real mosquitto broker on a free loopback port.

Broker tests need a real broker because the guarantees under test (persistent sessions,
redelivery of unacknowledged QoS 1 input, shared subscriptions, MQTT 5 user properties) are
the broker's behaviour as much as ours. Under CI=true a broker test fails, never skips, when
no broker can be started.
"""

from __future__ import annotations

import os
import shutil
import signal
import socket
import subprocess
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import pytest
from hypothesis import settings
from hypothesis.database import DirectoryBasedExampleDatabase

from relay.workbench.endtoend import free_port, stop_process
from tests.paths import ROOT

MOSQUITTO = os.environ.get("REHEAR_TEST_MOSQUITTO", "/usr/sbin/mosquitto")

# Hypothesis keeps the examples that failed before, to try them first, in .hypothesis/ under
# the working directory by default; kept in the checkout instead, a run from anywhere replays them.
settings.register_profile("rehear", database=DirectoryBasedExampleDatabase(ROOT / ".hypothesis" / "examples"))
settings.load_profile("rehear")


class MosquittoBroker:
    """A mosquitto process with a generated configuration; can be stopped and restarted."""

    host = "127.0.0.1"

    def __init__(self, workdir: Path, binary: str, *, listener: str = "", extra: str = "",
                 allow_anonymous: bool = True) -> None:
        """``listener``: options for the listener (TLS files); ``extra``: more configuration lines
        (an ACL or password file)."""
        self.workdir = workdir
        self.binary = binary
        self.port = free_port()
        self.process: subprocess.Popen[bytes] | None = None
        self.config_path = workdir / "mosquitto.conf"
        self.log_path = workdir / "mosquitto.log"
        (workdir / "data").mkdir(exist_ok=True)
        # set_tcp_nodelay: without it every broker hop waits on Nagle's algorithm (~5 ms).
        # persistence: sessions and queued QoS 1 messages survive a broker restart.
        self.config_path.write_text(
            f"listener {self.port} 127.0.0.1\n"
            + listener
            + f"allow_anonymous {'true' if allow_anonymous else 'false'}\n"
            + extra
            # Started as root, mosquitto drops to its own user, which cannot open the test's private
            # temporary folder: no log, no persistence file, no ACL or certificates. Stay root.
            + ("user root\n" if hasattr(os, "geteuid") and os.geteuid() == 0 else "")
            + "set_tcp_nodelay true\n"
            "persistence true\n"
            f"persistence_location {workdir / 'data'}/\n"
            "autosave_interval 1\n"
            "max_queued_messages 10000\n"
            f"log_dest file {self.log_path}\n"
            "log_type error\nlog_type warning\nlog_type notice\n"
        )

    @property
    def address(self) -> str:
        return f"{self.host}:{self.port}"

    def start(self, timeout: float = 10.0) -> None:
        self.process = subprocess.Popen(
            [self.binary, "-c", str(self.config_path)], stdout=subprocess.DEVNULL, stderr=subprocess.PIPE
        )
        end = time.monotonic() + timeout
        while time.monotonic() < end:
            if self.process.poll() is not None:
                stderr = self.process.stderr.read().decode(errors="replace") if self.process.stderr else ""
                if self.process.stderr:
                    self.process.stderr.close()
                raise RuntimeError(f"mosquitto exited with {self.process.returncode}: {stderr.strip()}")
            try:
                with socket.create_connection((self.host, self.port), timeout=0.2):
                    return
            except OSError:
                time.sleep(0.05)
        raise RuntimeError(f"mosquitto did not accept connections on {self.address} within {timeout} s")

    def stop(self) -> None:
        if self.process is None:
            return
        stop_process(self.process)  # SIGTERM first: mosquitto writes its persistence file
        if self.process.stderr:
            self.process.stderr.close()
        self.process = None

    def restart(self) -> None:
        self.stop()
        self.start()

    def reload(self) -> None:
        """SIGHUP: mosquitto reads its ACL and password files again (mosquitto.conf(5))."""
        if self.process is not None:
            self.process.send_signal(signal.SIGHUP)

    def log(self) -> str:
        return self.log_path.read_text(errors="replace") if self.log_path.exists() else ""


def _unavailable(message: str) -> None:
    if os.environ.get("CI", "").lower() == "true":
        pytest.fail(f"no MQTT broker for broker tests: {message}")
    pytest.skip(f"no MQTT broker: {message}")


def program(name: str, package: str | None = None) -> str:
    """Where the program ``name`` is installed. Without it a test fails under CI=true, where
    .ci/run installs the Debian ``package`` (by default the program's own name), and is skipped
    elsewhere."""
    found = shutil.which(name)
    if found is None:
        package = package or name
        if os.environ.get("CI", "").lower() == "true":
            pytest.fail(f"{name} not found (Debian package {package}; .ci/run installs it)")
        pytest.skip(f"{name} not found (apt-get install {package})")
    return found


@pytest.fixture(scope="session")
def mosquitto(tmp_path_factory: pytest.TempPathFactory) -> Iterator[MosquittoBroker]:
    binary = MOSQUITTO if os.path.exists(MOSQUITTO) else shutil.which("mosquitto")
    if not binary:
        _unavailable(f"{MOSQUITTO} not found")
    broker = MosquittoBroker(tmp_path_factory.mktemp("mosquitto"), str(binary))
    try:
        broker.start()
    except (OSError, RuntimeError) as exc:
        _unavailable(str(exc))
    yield broker
    broker.stop()


@pytest.fixture
def make_broker(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Callable[..., MosquittoBroker]]:
    """Start a broker of the test's own (ACL, password file, TLS listener); stopped after the test."""
    binary = MOSQUITTO if os.path.exists(MOSQUITTO) else shutil.which("mosquitto")
    started: list[MosquittoBroker] = []

    def start(**options: Any) -> MosquittoBroker:
        if not binary:
            _unavailable(f"{MOSQUITTO} not found")
        broker = MosquittoBroker(tmp_path_factory.mktemp("mosquitto"), str(binary), **options)
        try:
            broker.start()
        except (OSError, RuntimeError) as exc:
            _unavailable(str(exc))
        started.append(broker)
        return broker

    yield start
    for broker in started:
        broker.stop()


@pytest.fixture
def broker(mosquitto: MosquittoBroker) -> MosquittoBroker:
    """The session broker, started again if an earlier test left it stopped."""
    if mosquitto.process is None or mosquitto.process.poll() is not None:
        mosquitto.process = None
        mosquitto.start()
    return mosquitto
