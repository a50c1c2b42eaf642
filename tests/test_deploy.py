"""The deployment files against the outside world and against the project: the Kubernetes
manifests validate against the Kubernetes API schema (kubernetes-validate's bundled copy), and
every setting, path, port and file they name is one keepset really has."""

from __future__ import annotations

import re
import tomllib
from pathlib import Path
from typing import Any

import kubernetes_validate
import pytest
import yaml
from conftest import ROOT

from service.app import create_app
from service.settings import Settings

MANIFESTS = ROOT / "deploy" / "kubernetes" / "keepset.yaml"
CONTAINERFILE = ROOT / "deploy" / "container" / "Containerfile"
KUBERNETES_VERSION = "1.30.0"


def documents() -> list[dict[str, Any]]:
    return [d for d in yaml.safe_load_all(MANIFESTS.read_text()) if d]


def of_kind(kind: str) -> dict[str, Any]:
    (found,) = [d for d in documents() if d["kind"] == kind]
    return found


def container() -> dict[str, Any]:
    (keepset,) = of_kind("Deployment")["spec"]["template"]["spec"]["containers"]
    return dict(keepset)


@pytest.mark.parametrize("kind", ["Secret", "Deployment", "Service"])
def test_manifests_validate_against_the_kubernetes_schema(kind: str) -> None:
    kubernetes_validate.validate(of_kind(kind), KUBERNETES_VERSION, strict=True)


def setting_names(names: list[str]) -> set[str]:
    return {n.removeprefix("KEEPSET_").lower() for n in names if n.startswith("KEEPSET_")}


def test_every_variable_is_a_keepset_setting() -> None:
    env = [e["name"] for e in container()["env"]]
    image_env = re.findall(r"\b(KEEPSET_[A-Z_]+)=", CONTAINERFILE.read_text())
    assert env and image_env
    unknown = (setting_names(env) | setting_names(image_env)) - set(Settings.model_fields)
    assert not unknown, unknown


def test_probes_ports_and_keys_match_the_service() -> None:
    paths = {getattr(r, "path", None) for r in create_app(Settings(reload_poll_seconds=0)).routes}
    spec = container()
    for probe in ("readinessProbe", "livenessProbe", "startupProbe"):
        assert spec[probe]["httpGet"]["path"] in paths
    assert spec["readinessProbe"]["httpGet"]["path"] == "/readyz"
    port = Settings.model_fields["port"].default
    assert spec["ports"][0]["containerPort"] == port
    assert of_kind("Service")["spec"]["ports"][0]["port"] == port
    assert f"EXPOSE {port}" in CONTAINERFILE.read_text()
    # The keys file the pods mount is where KEEPSET_KEYS points, and holds the demo hashes.
    env = {e["name"]: e["value"] for e in spec["env"]}
    mount = {m["name"]: m["mountPath"] for m in spec["volumeMounts"]}["keys"]
    keys_file = next(iter(of_kind("Secret")["stringData"]))
    assert env["KEEPSET_KEYS"] == f"{mount}/{keys_file}"
    secret_keys = yaml.safe_load(of_kind("Secret")["stringData"][keys_file])
    assert secret_keys == yaml.safe_load((ROOT / "deploy" / "demo-keys.yaml").read_text())


def test_the_grace_period_covers_the_drain_and_the_shutdown() -> None:
    env = {e["name"]: e["value"] for e in container()["env"]}
    pod = of_kind("Deployment")["spec"]["template"]["spec"]
    drain = float(env.get("KEEPSET_DRAIN_SECONDS", Settings.model_fields["drain_seconds"].default))
    shutdown = float(
        env.get("KEEPSET_SHUTDOWN_SECONDS", Settings.model_fields["shutdown_seconds"].default)
    )
    # A few seconds over: the kubelet's SIGKILL must never cut a stream the drain let finish.
    assert pod["terminationGracePeriodSeconds"] >= drain + shutdown + 3


def test_containerfile_copies_what_exists_and_runs_the_cli() -> None:
    text = CONTAINERFILE.read_text()
    sources = [
        part
        for line in text.splitlines()
        if line.startswith("COPY ") and "--from=" not in line
        for part in line.split()[1:-1]
    ]
    assert sources
    for source in sources:
        assert (ROOT / source).exists(), source
    scripts = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]["scripts"]
    command = re.search(r'^CMD \["([^"]+)", "([^"]+)"\]', text, re.MULTILINE)
    assert command is not None and command[1] in scripts and command[2] == "serve"
    user = re.search(r"^USER (\d+)$", text, re.MULTILINE)
    run_as = of_kind("Deployment")["spec"]["template"]["spec"]["securityContext"]["runAsUser"]
    assert user is not None and int(user[1]) == run_as


def test_readme_points_at_the_deploy_files() -> None:
    readme = (ROOT / "README.md").read_text()
    for path in (MANIFESTS, CONTAINERFILE):
        assert str(path.relative_to(ROOT)) in readme
    assert Path(ROOT / "deploy" / "demo-keys.yaml").exists()
