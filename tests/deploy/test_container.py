"""The container build: its structure checked without an engine, then built and run with buildah.

No container registry can be reached from this project's machines (only the package
registries), so the official Python base image cannot be pulled. The base is made from Debian
packages instead: debootstrap, then Debian's Python 3.11 with venv and headers, imported as a
local image (built once, reused after). `podman run` cannot start containers here (the sandbox
refuses crun's setrlimit calls), so the image runs under buildah's chroot isolation, which
needs no OCI runtime; it shares the host's network, so the relay inside reaches the test broker.
"""

from __future__ import annotations

import asyncio
import re
import shutil
import subprocess
from pathlib import Path
from typing import Any

import orjson
import pytest

from tests.conftest import program
from tests.integration.support import Collector, message, publish_all
from tests.paths import ROOT, WORKSHOP

CONTAINERFILE = ROOT / "deploy/container/Containerfile"
BASE = "localhost/rehear-base:bookworm"
IMAGE = "localhost/rehear:test"


def _stages() -> list[list[str]]:
    """The Containerfile's instructions, split into build stages (continuation lines joined)."""
    text = re.sub(r"\\\n", " ", CONTAINERFILE.read_text())
    stages: list[list[str]] = []
    for line in text.splitlines():
        line = line.strip()
        if not line or line.startswith("#"):
            continue
        if line.upper().startswith("FROM "):
            stages.append([])
        if stages:
            stages[-1].append(line)
    return stages


def test_the_build_has_a_compile_stage_and_a_slim_non_root_runtime() -> None:
    build, runtime = _stages()
    assert build[0].endswith(" AS build") and runtime[0].endswith(" AS runtime")
    compile_step = " ".join(line for line in build if line.startswith("RUN apt-get"))
    assert "g++" in compile_step and "cmake" in compile_step  # kenlm has no wheel; the kernels are C
    copied = " ".join(line for line in build if line.startswith("COPY"))
    assert "setup.py" in copied and "pyproject.toml" in copied  # setup.py is what builds the C kernels
    assert any("kernels.compiled is None" in line for line in build)  # the build fails without them
    assert not any(word in line for line in runtime for word in ("g++", "cmake", "apt-get install"))
    assert any(line.startswith("COPY --from=build /opt/rehear") for line in runtime)
    user = [line.split()[1] for line in runtime if line.startswith("USER ")]
    assert user and user[-1] not in ("0", "root")
    assert any(line.startswith("ENTRYPOINT") and '"rehear", "run"' in line for line in runtime)


def _run(argv: list[str], timeout: float) -> str:
    done = subprocess.run(argv, capture_output=True, text=True, timeout=timeout)
    assert done.returncode == 0, f"{' '.join(argv[:4])}...: {done.stdout[-3000:]}\n{done.stderr[-3000:]}"
    return done.stdout


def _base(buildah: str, tmp: Path) -> None:
    """Debian bookworm with Python 3.11, from Debian packages only (see the module's docstring)."""
    if subprocess.run([buildah, "inspect", BASE], capture_output=True, timeout=60).returncode == 0:
        return
    rootfs = tmp / "rootfs"
    _run([program("debootstrap"), "--variant=minbase", "bookworm", str(rootfs), "http://deb.debian.org/debian"], 900)
    tarball = tmp / "rootfs.tar"
    _run(["tar", "-C", str(rootfs), "-cf", str(tarball), "."], 300)
    container = _run([buildah, "from", "scratch"], 60).strip()
    try:
        _run([buildah, "add", container, str(tarball), "/"], 300)
        _run([buildah, "run", "--isolation", "chroot", "--network", "host", container, "--", "sh", "-c",
              "apt-get update -q && apt-get install -y -q --no-install-recommends python3 python3-venv "
              "python3-dev ca-certificates && rm -rf /var/lib/apt/lists/*"], 900)
        # This machine reaches PyPI through a proxy whose certificate authority only the host trusts.
        _run([buildah, "copy", container, "/etc/ssl/certs/ca-certificates.crt", "/etc/ssl/certs/host-ca.crt"], 60)
        _run([buildah, "config", "--env", "PIP_CERT=/etc/ssl/certs/host-ca.crt", container], 60)
        _run([buildah, "commit", container, BASE], 300)
    finally:
        subprocess.run([buildah, "rm", container], capture_output=True, timeout=60)


@pytest.mark.slow
@pytest.mark.broker
def test_the_image_builds_and_its_relay_cleans_a_message(broker: Any, tmp_path: Path) -> None:
    buildah = program("buildah")
    _base(buildah, tmp_path)
    _run([buildah, "bud", "--isolation", "chroot", "--network", "host", "--build-arg", f"BASE={BASE}",
          "-f", str(CONTAINERFILE), "-t", IMAGE, str(ROOT)], 1800)
    config = tmp_path / "etc"
    config.mkdir()
    for name in ("lexicon.csv", "train.txt", "workshop.arpa", "speakers.csv"):
        shutil.copy(WORKSHOP / name, config / name)
    # As deploy/README.md tells: the cache where the image says (CACHE_DIRECTORY), the rest read-only.
    text = (WORKSHOP / "relay.yaml").read_text().replace("port: 9464", "port: 0")
    (config / "relay.yaml").write_text("cache_dir: ${CACHE_DIRECTORY:-.rehear-cache}\n" + text)
    container = _run([buildah, "from", IMAGE], 120).strip()
    run = [buildah, "run", "--isolation", "chroot", "--network", "host", "--user", "10001",
           "-v", f"{config}:/etc/rehear:ro", "--env", f"MQTT_HOST={broker.host}", "--env", f"MQTT_PORT={broker.port}",
           container, "--"]
    try:
        kernels = _run([*run, "/opt/rehear/bin/python", "-c",
                        "from stages.lexicon.sound import kernels; import os; print(kernels.compiled is not None, "
                        "os.getuid())"], 120)
        assert kernels.split() == ["True", "10001"]
        _run([*run, "rehear", "check", "/etc/rehear/relay.yaml"], 300)
        _relay_in_the_container(run, broker)
    finally:
        subprocess.run([buildah, "rm", container], capture_output=True, timeout=60)


def _relay_in_the_container(run: list[str], broker: Any) -> None:
    async def scenario() -> dict[str, Any]:
        async with Collector(broker, ["workshop/+/nlu"]) as down:
            process = await asyncio.create_subprocess_exec(
                *run, "rehear", "run", "/etc/rehear/relay.yaml", stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
            try:
                assert process.stderr is not None
                async with asyncio.timeout(120):
                    while True:
                        line = await process.stderr.readline()
                        assert line, "the relay in the container ended before it connected"
                        if b"connected" in line:
                            break
                sample = message("c-1", "book the tamsin lathe", source="bench-2")
                await publish_all(broker, "workshop/bench-2/asr", [orjson.dumps(sample)])
                await down.wait_for(lambda items: bool(items), timeout=30)
            finally:
                if process.returncode is None:
                    process.terminate()
                    try:
                        await asyncio.wait_for(process.wait(), 30)
                    except TimeoutError:
                        process.kill()
                        await process.wait()
            result: dict[str, Any] = orjson.loads(down.received[0].payload)
            return result

    cleaned = asyncio.run(scenario())
    assert cleaned["id"] == "c-1" and cleaned["decision"] in ("accept", "confirm", "reprompt")
    assert cleaned["relay"]["version"]
