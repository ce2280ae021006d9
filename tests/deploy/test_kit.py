"""The deploy kit as shipped: the systemd unit, the Kubernetes example and the dashboard agree
with what the relay reads and writes."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import yaml

from relay.core.config import parse_config
from relay.core.yamlsource import load_yaml
from tests.conftest import program
from tests.paths import ROOT

DEPLOY = ROOT / "deploy"


def _unit() -> dict[str, list[str]]:
    values: dict[str, list[str]] = {}
    for line in (DEPLOY / "systemd/rehear.service").read_text().splitlines():
        if "=" in line and not line.startswith(("#", "[")):
            key, _, value = line.partition("=")
            values.setdefault(key.strip(), []).append(value.strip())
    return values


def test_the_unit_gives_the_relay_writable_cache_and_state_and_an_environment_file() -> None:
    unit = _unit()
    assert unit["ProtectSystem"] == ["strict"]
    # Under ProtectSystem=strict only these are writable; systemd names them in the environment.
    assert unit["StateDirectory"] == ["rehear"] and unit["CacheDirectory"] == ["rehear"]
    assert unit["WorkingDirectory"] == ["/var/lib/rehear"]
    assert unit["EnvironmentFile"] == ["-/etc/rehear/rehear.env"]
    assert unit["ExecStart"][0].startswith("/opt/rehear/bin/rehear run /etc/rehear/relay.yaml")
    # The configuration the install instructions give resolves into those directories.
    text = "cache_dir: ${CACHE_DIRECTORY:-.rehear-cache}\ncapture:\n  directory: ${STATE_DIRECTORY:-.}/capture\n"
    source = load_yaml(Path("relay.yaml"), text=text,
                       env={"CACHE_DIRECTORY": "/var/cache/rehear", "STATE_DIRECTORY": "/var/lib/rehear"})
    config = parse_config(source, base_dir=Path("/etc/rehear")).config
    assert config.cache_dir == "/var/cache/rehear" and config.capture.directory == Path("/var/lib/rehear/capture")
    assert "cache_dir: ${CACHE_DIRECTORY:-.rehear-cache}" in (DEPLOY / "README.md").read_text()


def test_systemd_analyze_finds_nothing_wrong_with_the_unit(tmp_path: Path) -> None:
    analyze = program("systemd-analyze", "systemd")
    # verify also checks that ExecStart's program exists: stand one in for /opt/rehear/bin/rehear.
    unit = (DEPLOY / "systemd/rehear.service").read_text().replace("/opt/rehear/bin/rehear", sys.executable)
    (tmp_path / "rehear.service").write_text(unit)
    done = subprocess.run([analyze, "verify", str(tmp_path / "rehear.service")], capture_output=True, text=True,
                          timeout=60)
    problems = [line for line in (done.stdout + done.stderr).splitlines() if "rehear.service" in line]
    assert done.returncode == 0 and not problems, done.stdout + done.stderr


def _documents() -> list[dict[str, object]]:
    return list(yaml.safe_load_all((DEPLOY / "kubernetes/sidecar.yaml").read_text()))


def test_the_pod_ships_lexicon_and_model_through_a_volume_and_its_configuration_is_valid() -> None:
    documents = _documents()
    config_map = next(d for d in documents if d["kind"] == "ConfigMap")
    text = config_map["data"]["relay.yaml"]  # type: ignore[index]
    env = {"POD_NAME": "nlu-0", "MQTT_PASSWORD": "x"}
    loaded = parse_config(load_yaml(Path("relay.yaml"), text=text, env=env), base_dir=Path("/etc/rehear"))
    domain = loaded.domain
    assert [s.name for s in loaded.config.stages] == ["normalize", "lm_rescore", "lexicon", "gate"]
    pod = next(d for d in documents if d["kind"] == "StatefulSet")["spec"]["template"]["spec"]  # type: ignore[index]
    relay = next(c for c in pod["containers"] if c["name"] == "rehear")
    mounts = {m["mountPath"]: m for m in relay["volumeMounts"]}
    volumes = {v["name"]: v for v in pod["volumes"]}
    for path in (domain.lexicon, domain.text, domain.language_model, domain.speakers):
        assert path is not None
        mount = next(m for p, m in mounts.items() if str(path).startswith(p + "/"))
        assert "emptyDir" in volumes[mount["name"]], path  # filled by the init container, not a ConfigMap
    init = pod["initContainers"][0]
    assert any(m["name"] == mounts["/var/lib/rehear/domain"]["name"] for m in init["volumeMounts"])
    # The compiled lexicon needs a writable place under a read-only root file system.
    assert relay["securityContext"]["readOnlyRootFilesystem"] is True
    assert loaded.config.cache_dir in mounts and not mounts[loaded.config.cache_dir].get("readOnly")


def test_the_dashboard_reads_its_data_source_from_a_variable() -> None:
    dashboard = json.loads((DEPLOY / "grafana/rehear-dashboard.json").read_text())
    variables = {v["name"]: v for v in dashboard["templating"]["list"]}
    assert variables["datasource"]["type"] == "datasource" and variables["datasource"]["query"] == "prometheus"
    for panel in dashboard["panels"]:
        assert panel["datasource"] == {"type": "prometheus", "uid": "${datasource}"}, panel["title"]
        assert all(t["datasource"]["uid"] == "${datasource}" for t in panel["targets"]), panel["title"]
