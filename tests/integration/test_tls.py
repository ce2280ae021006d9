"""Finding 8: TLS to the broker, client certificates and passwords from a file, against mosquitto's
own TLS listener with certificates the test makes with openssl."""

from __future__ import annotations

import asyncio
import shutil
import ssl
import subprocess
from pathlib import Path
from typing import Any

import orjson
import pytest

from tests.integration.support import (
    Collector,
    eventually,
    healthz,
    ids,
    load,
    make_config,
    message,
    publish_all,
    running_relay,
)

pytestmark = pytest.mark.broker


def _openssl(*args: str, cwd: Path) -> None:
    subprocess.run(["openssl", *args], cwd=cwd, check=True, capture_output=True, timeout=60)


def _authority(folder: Path, name: str) -> None:
    _openssl("req", "-x509", "-newkey", "rsa:2048", "-nodes", "-days", "2", "-subj", f"/CN={name}",
             "-keyout", f"{name}.key", "-out", f"{name}.crt", cwd=folder)


def _signed(folder: Path, name: str, ca: str, *, server: bool, names: str = "IP:127.0.0.1,DNS:localhost") -> None:
    _openssl("req", "-newkey", "rsa:2048", "-nodes", "-subj", f"/CN={name}", "-keyout", f"{name}.key",
             "-out", f"{name}.csr", cwd=folder)
    extensions = folder / f"{name}.ext"
    # The broker's certificate names the loopback address and localhost: what the relay checks
    # against broker.host when tls.check_hostname is on.
    extensions.write_text(f"subjectAltName={names}\nextendedKeyUsage=serverAuth\n" if server
                          else "extendedKeyUsage=clientAuth\n")
    _openssl("x509", "-req", "-in", f"{name}.csr", "-CA", f"{ca}.crt", "-CAkey", f"{ca}.key", "-CAcreateserial",
             "-days", "2", "-extfile", extensions.name, "-out", f"{name}.crt", cwd=folder)


@pytest.fixture(scope="module")
def certificates(tmp_path_factory: pytest.TempPathFactory) -> Path:
    if shutil.which("openssl") is None:
        pytest.fail("openssl is needed to make the test's certificates")
    folder = tmp_path_factory.mktemp("pki")
    _authority(folder, "test-ca")
    _authority(folder, "other-ca")
    _signed(folder, "broker", "test-ca", server=True)
    _signed(folder, "elsewhere", "test-ca", server=True, names="DNS:elsewhere.invalid")
    _signed(folder, "relay", "test-ca", server=False)
    _signed(folder, "tester", "test-ca", server=False)
    return folder


def _client_tls(pki: Path) -> ssl.SSLContext:
    context = ssl.create_default_context(cafile=str(pki / "test-ca.crt"))
    context.load_cert_chain(str(pki / "tester.crt"), str(pki / "tester.key"))
    return context


def _tls_broker(make_broker: Any, pki: Path, tmp_path: Path, server: str = "broker") -> Any:
    passwords = tmp_path / "passwords"
    passwords.write_text("relay:s3cret-for-tests\ntester:tester-pw\n")
    # mosquitto_passwd -U hashes a plain "user:password" file in place (mosquitto_passwd(1))
    subprocess.run(["mosquitto_passwd", "-U", str(passwords)], check=True, capture_output=True, timeout=30)
    # require_certificate: the broker refuses clients without a certificate from its CA
    listener = (f"cafile {pki / 'test-ca.crt'}\ncertfile {pki / (server + '.crt')}\nkeyfile {pki / (server + '.key')}\n"
                "require_certificate true\ntls_version tlsv1.2\n")
    return make_broker(listener=listener, extra=f"password_file {passwords}\n", allow_anonymous=False)


def test_8_the_relay_connects_over_tls_with_a_client_certificate_and_a_password_file(
    make_broker: Any, certificates: Path, tmp_path: Path
) -> None:
    broker = _tls_broker(make_broker, certificates, tmp_path)
    secret = tmp_path / "relay-password"
    secret.write_text("s3cret-for-tests\n")
    tls = {"ca_file": str(certificates / "test-ca.crt"), "cert_file": str(certificates / "relay.crt"),
           "key_file": str(certificates / "relay.key"), "check_hostname": True, "min_version": 1.2}
    path, prefix = make_config(tmp_path, broker, broker={"username": "relay", "password_file": str(secret), "tls": tls})
    wanted = [f"tls-{n:02d}" for n in range(40)]
    options = {"tls_context": _client_tls(certificates), "username": "tester", "password": "tester-pw"}

    async def scenario() -> None:
        async with running_relay(load(path)) as relay, Collector(broker, [f"{prefix}/nlu/#"], **options) as down:
            await publish_all(broker, f"{prefix}/asr/kiosk-1/nbest",
                              [orjson.dumps(message(ident, "over tls")) for ident in wanted], **options)
            await down.wait_for(lambda items: len(items) >= len(wanted))
            await relay.wait_handled(len(wanted))
            status, _ = await asyncio.to_thread(healthz, relay.health.address)
        assert sorted(ids(down.received)) == wanted
        assert status == 200 and relay.metric("rehear_connect_failures_total", reason="tls") == 0

    asyncio.run(scenario())


@pytest.mark.parametrize("wrong", ["ca", "no_client_certificate", "hostname"])
def test_8_a_broker_that_cannot_be_verified_is_refused_with_a_clear_error(
    make_broker: Any, certificates: Path, tmp_path: Path, wrong: str, caplog: pytest.LogCaptureFixture
) -> None:
    # "hostname": the broker presents a certificate of its CA, but for another name
    broker = _tls_broker(make_broker, certificates, tmp_path, "elsewhere" if wrong == "hostname" else "broker")
    tls: dict[str, Any] = {"ca_file": str(certificates / "test-ca.crt"), "cert_file": str(certificates / "relay.crt"),
                           "key_file": str(certificates / "relay.key")}
    if wrong == "ca":
        tls["ca_file"] = str(certificates / "other-ca.crt")  # the broker's certificate is not signed by it
    elif wrong == "no_client_certificate":
        del tls["cert_file"], tls["key_file"]
    path, _prefix = make_config(tmp_path, broker,
                                broker={"username": "relay", "password": "s3cret-for-tests", "tls": tls})

    async def scenario() -> None:
        async with running_relay(load(path), connect=False) as relay:
            await eventually(lambda: relay.metric("rehear_connect_failures_total", reason="tls") >= 2, timeout=15,
                             what="TLS failures counted")
            status, body = await asyncio.to_thread(healthz, relay.health.address)
            assert not relay.relay.connected
        assert status == 503 and "TLS handshake with broker" in body
        errors = [r.getMessage() for r in caplog.records if r.levelname == "ERROR" and "TLS handshake" in r.getMessage()]
        assert len(errors) >= 2  # an error line for every attempt, not a silent retry
        if wrong == "hostname":
            assert "127.0.0.1" in errors[0] and "mismatch" in errors[0].lower()

    asyncio.run(scenario())
