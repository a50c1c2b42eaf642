"""The deployment files against the outside world and against the project: both kustomize
overlays render with the real ``kubectl kustomize``, every rendered document validates against
the Kubernetes API schema (kubernetes-validate's bundled copy), and every setting, path, port,
probe, volume and file they name is one keepset really has. The registry ConfigMap is written
out the way the kubelet mounts it and loaded with keepset's own registry loader.

kubectl must be on PATH (deploy/kubernetes/install-kubectl.sh installs it). With
``KUBECTL_COMPAT`` naming a second kubectl (e.g. Debian's 1.20, kustomize 2.0), the overlays must
render the same with it too.
"""

from __future__ import annotations

import functools
import hashlib
import importlib.util
import os
import re
import shutil
import subprocess
import sys
import tempfile
import tomllib
from pathlib import Path, PurePosixPath
from types import ModuleType
from typing import Any

import kubernetes_validate
import numpy as np
import pytest
import yaml
from conftest import DEMO_KEYS, ROOT, start_server, stop_server

from service.app import create_app
from service.cli import main as cli
from service.client import Client
from service.registry import load_registry
from service.settings import Settings

KUBERNETES = ROOT / "deploy" / "kubernetes"
CONTAINERFILE = ROOT / "deploy" / "container" / "Containerfile"
POLICIES = ROOT / "policies"
FORMS = ("sidecar", "shared")
# Native sidecars (an init container's restartPolicy) are in the API from 1.28, on by default
# from 1.29; the schema of a version past both, and strict (unknown fields are errors).
KUBERNETES_VERSION = "1.30.0"
KEEPSET_PORT = Settings.model_fields["port"].default


def load_sync() -> ModuleType:
    spec = importlib.util.spec_from_file_location("sync_registry", KUBERNETES / "sync_registry.py")
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


sync = load_sync()


@functools.cache
def rendered(form: str, kubectl: str = "kubectl") -> tuple[dict[str, Any], ...]:
    if shutil.which(kubectl) is None:
        pytest.fail(f"{kubectl} not found: run deploy/kubernetes/install-kubectl.sh")
    result = subprocess.run(
        [kubectl, "kustomize", str(KUBERNETES / "overlays" / form)],
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert result.returncode == 0, result.stderr
    return tuple(d for d in yaml.safe_load_all(result.stdout) if d)


def one(form: str, kind: str, name: str | None = None) -> dict[str, Any]:
    (found,) = [
        d
        for d in rendered(form)
        if d["kind"] == kind and (name is None or d["metadata"]["name"] == name)
    ]
    return found


def pod(form: str) -> dict[str, Any]:
    spec: dict[str, Any] = one(form, "Deployment")["spec"]["template"]["spec"]
    return spec


def keepset_container(form: str) -> dict[str, Any]:
    spec = pod(form)
    (found,) = [
        c for c in spec.get("initContainers", []) + spec["containers"] if c["name"] == "keepset"
    ]
    return found


def env_of(container: dict[str, Any]) -> dict[str, str]:
    return {e["name"]: e["value"] for e in container.get("env", []) if "value" in e}


def setting(container: dict[str, Any], name: str) -> Any:
    """The value keepset would use for a setting: the manifest's, else the default."""
    value = env_of(container).get(f"KEEPSET_{name.upper()}")
    return getattr(Settings.model_validate({} if value is None else {name: value}), name)


def volume(form: str, name: str) -> dict[str, Any]:
    (found,) = [v for v in pod(form)["volumes"] if v["name"] == name]
    return found


def volume_at(container: dict[str, Any], path: str) -> tuple[str, PurePosixPath]:
    """The volume holding ``path`` in ``container`` and the path inside that volume."""
    target = PurePosixPath(path)
    for mount in container.get("volumeMounts", []):
        mount_path = PurePosixPath(mount["mountPath"])
        if target == mount_path or mount_path in target.parents:
            return mount["name"], target.relative_to(mount_path)
    raise AssertionError(f"{path} is on no volume of {container['name']}")


# --- schema ------------------------------------------------------------------------------------


@pytest.mark.parametrize("form", FORMS)
def test_every_rendered_document_validates_against_the_kubernetes_schema(form: str) -> None:
    kinds = [d["kind"] for d in rendered(form)]
    assert {"Deployment", "ConfigMap", "Secret"} <= set(kinds)
    for document in rendered(form):
        kubernetes_validate.validate(document, KUBERNETES_VERSION, strict=True)


def test_the_schema_check_refuses_a_misspelt_sidecar_field() -> None:
    # The validation above would mean nothing if the schema let any init container field pass.
    deployment = yaml.safe_load(yaml.safe_dump(one("sidecar", "Deployment")))
    (sidecar,) = [
        c
        for c in deployment["spec"]["template"]["spec"]["initContainers"]
        if c["name"] == "keepset"
    ]
    sidecar["restartPolicyy"] = sidecar.pop("restartPolicy")
    with pytest.raises(kubernetes_validate.ValidationError):
        kubernetes_validate.validate(deployment, KUBERNETES_VERSION, strict=True)


@pytest.mark.skipif("KUBECTL_COMPAT" not in os.environ, reason="no second kubectl named")
@pytest.mark.parametrize("form", FORMS)
def test_an_older_kustomize_renders_the_same(form: str) -> None:
    def canonical(docs: tuple[dict[str, Any], ...]) -> list[str]:
        for d in docs:
            spec = d.get("spec", {}).get("template", {}).get("spec", {})
            # Versions differ in where a patched-in volume lands; the order means nothing.
            spec.get("volumes", []).sort(key=lambda v: v["name"])
        return sorted(yaml.safe_dump(d, sort_keys=True) for d in docs)

    old = rendered(form, os.environ["KUBECTL_COMPAT"])
    current = rendered(form)
    assert canonical(yaml.safe_load(yaml.safe_dump(old))) == canonical(
        yaml.safe_load(yaml.safe_dump(current))
    )


# --- the registry ConfigMap --------------------------------------------------------------------


def test_the_generated_registry_files_are_up_to_date() -> None:
    stale = sync.stale(KUBERNETES, POLICIES)
    assert not stale, f"run python deploy/kubernetes/sync_registry.py: {stale}"


def test_the_generator_follows_a_published_version_and_a_removed_file(tmp_path: Path) -> None:
    policies = tmp_path / "policies"
    shutil.copytree(POLICIES, policies)
    target = tmp_path / "kubernetes"
    sync.write(target, policies)
    assert sync.stale(target, policies) == []
    (policies / "prompt-book" / "6.yaml").write_bytes(b"name: prompt-book\n")
    (policies / "surtitles" / "1.yaml").unlink()
    stale = set(sync.stale(target, policies))
    assert {"base/registry/prompt-book.6.yaml", "base/registry/surtitles.1.yaml"} <= stale
    assert "overlays/sidecar/registry-items.yaml" in stale
    sync.write(target, policies)
    assert sync.stale(target, policies) == []
    assert not (target / "base/registry/surtitles.1.yaml").exists()


def test_the_generator_refuses_paths_that_would_share_a_key() -> None:
    with pytest.raises(ValueError, match="same ConfigMap key"):
        sync.keys_by_path(["a/1.yaml", "a.1.yaml"])
    with pytest.raises(ValueError, match="not a valid ConfigMap key"):
        sync.keys_by_path(["scene 1/1.yaml"])


def mount_like_the_kubelet(folder: Path, files: dict[str, bytes]) -> None:
    """A ConfigMap volume as the kubelet writes it: the files in a timestamped folder, ``..data``
    pointing at it, and each top-level entry a link through ``..data``."""
    stamped = folder / "..2026_12_03_12_00_00.000000001"
    for path, data in files.items():
        (stamped / path).parent.mkdir(parents=True, exist_ok=True)
        (stamped / path).write_bytes(data)
    (folder / "..data").symlink_to(stamped.name)
    for entry in {PurePosixPath(p).parts[0] for p in files}:
        (folder / entry).symlink_to(f"..data/{entry}")


@pytest.mark.parametrize("form", FORMS)
def test_the_mounted_configmap_is_the_registry_byte_for_byte(form: str, tmp_path: Path) -> None:
    configmap = one(form, "ConfigMap", "keepset-registry")
    source = volume(form, "registry")["configMap"]
    assert source["name"] == configmap["metadata"]["name"]
    # Every key projected, by its registry path; nothing else in the ConfigMap.
    items = {i["key"]: i["path"] for i in source["items"]}
    assert set(items) == set(configmap["data"])
    files = {items[key]: text.encode() for key, text in configmap["data"].items()}
    assert files == sync.registry_files(POLICIES)
    # The folder keepset reads is that volume's mount.
    container = keepset_container(form)
    name, inside = volume_at(container, str(setting(container, "policies")))
    assert (name, inside) == ("registry", PurePosixPath("."))
    mounted = tmp_path / "policies"
    mounted.mkdir()
    mount_like_the_kubelet(mounted, files)
    snapshot = load_registry(mounted)
    assert snapshot.valid, snapshot.problem_lines()
    assert snapshot.policies.keys() == load_registry(POLICIES).policies.keys()
    assert set(snapshot.routes) == set(load_registry(POLICIES).routes)
    assert cli(["policy", "check", str(mounted)]) == 0


# --- keepset's settings, routes, ports and files -----------------------------------------------


def setting_names(names: list[str]) -> set[str]:
    return {n.removeprefix("KEEPSET_").lower() for n in names if n.startswith("KEEPSET_")}


@pytest.mark.parametrize("form", FORMS)
def test_every_variable_is_a_keepset_setting_with_a_valid_value(form: str) -> None:
    spec = pod(form)
    names = [
        e["name"]
        for c in spec.get("initContainers", []) + spec["containers"]
        for e in c.get("env", [])
    ]
    image_env = re.findall(r"\b(KEEPSET_[A-Z_]+)=", CONTAINERFILE.read_text())
    assert setting_names(names) and image_env
    unknown = (setting_names(names) | setting_names(image_env)) - set(Settings.model_fields)
    assert not unknown, unknown
    values = {
        k.removeprefix("KEEPSET_").lower(): v
        for k, v in env_of(keepset_container(form)).items()
        if k.startswith("KEEPSET_")
    }
    Settings.model_validate(values)


def routes() -> set[str]:
    app = create_app(Settings(reload_poll_seconds=0))
    return {path for r in app.routes if (path := getattr(r, "path", None))}


def probe_target(container: dict[str, Any], probe: str) -> tuple[str, int, str]:
    """Host, port and path a probe asks: an httpGet's, or the loopback URL an exec probe opens."""
    spec = container[probe]
    if "httpGet" in spec:
        port = spec["httpGet"]["port"]
        if isinstance(port, str):
            (port,) = [p["containerPort"] for p in container["ports"] if p["name"] == port]
        return "pod", int(port), spec["httpGet"]["path"]
    url = re.search(
        r"http://([0-9.]+):([0-9]+)(/[A-Za-z0-9/_-]*)", " ".join(spec["exec"]["command"])
    )
    assert url is not None, spec
    return url[1], int(url[2]), url[3]


@pytest.mark.parametrize("form", FORMS)
def test_probes_ask_real_routes_on_keepsets_port(form: str) -> None:
    container = keepset_container(form)
    paths = routes()
    assert setting(container, "port") == KEEPSET_PORT
    for probe in ("startupProbe", "readinessProbe", "livenessProbe"):
        host, port, path = probe_target(container, probe)
        assert path in paths, path
        assert port == setting(container, "port")
        if host != "pod":  # an exec probe must ask where keepset listens
            assert host == setting(container, "host")
    assert probe_target(container, "readinessProbe")[2] == "/readyz"


@pytest.mark.parametrize("form", FORMS)
def test_the_keys_file_is_the_secrets_demo_file(form: str) -> None:
    container = keepset_container(form)
    name, inside = volume_at(container, str(setting(container, "keys")))
    secret = one(form, "Secret", volume(form, name)["secret"]["secretName"])
    keys = yaml.safe_load(secret["stringData"][str(inside)])
    assert keys == yaml.safe_load((ROOT / "deploy" / "demo-keys.yaml").read_text())


@pytest.mark.parametrize("form", FORMS)
def test_the_grace_period_covers_the_drain_and_the_shutdown(form: str) -> None:
    container = keepset_container(form)
    drain = setting(container, "drain_seconds")
    shutdown = setting(container, "shutdown_seconds")
    # A few seconds over: the kubelet's SIGKILL must never cut a stream the drain let finish.
    assert pod(form)["terminationGracePeriodSeconds"] >= drain + shutdown + 3


@pytest.mark.parametrize("form", FORMS)
def test_every_container_is_locked_down(form: str) -> None:
    spec = pod(form)
    assert spec["securityContext"]["runAsNonRoot"] is True
    assert not spec.get("hostNetwork", False)
    for container in spec.get("initContainers", []) + spec["containers"]:
        context = container["securityContext"]
        assert context["allowPrivilegeEscalation"] is False
        assert context["readOnlyRootFilesystem"] is True
        assert context["capabilities"]["drop"] == ["ALL"]
        assert all("hostPort" not in p for p in container.get("ports", []))
        assert "cpu" in container["resources"]["requests"]
        assert "memory" in container["resources"]["limits"]


@pytest.mark.parametrize("form", FORMS)
def test_keepset_writes_only_to_volumes(form: str) -> None:
    """The root filesystem is read-only: the metrics folder (under /tmp), the socket's folder and
    numba's cache must be on writable volumes, and the cache starts as a copy of the image's."""
    spec = pod(form)
    container = keepset_container(form)
    writable = [str(p) for p in ("/tmp", setting(container, "uds")) if p is not None]
    for path in [*writable, env_of(container)["NUMBA_CACHE_DIR"]]:
        name, _ = volume_at(container, str(path))
        assert "emptyDir" in volume(form, name), path
    image_cache = re.search(r"NUMBA_CACHE_DIR=(\S+)", CONTAINERFILE.read_text())
    assert image_cache is not None
    names = [c["name"] for c in spec["initContainers"]]
    copy = spec["initContainers"][names.index("numba-cache")]
    # Init containers run in order: the copy is done before a sidecar keepset starts.
    assert "keepset" not in names or names.index("numba-cache") < names.index("keepset")
    assert copy["image"] == container["image"]
    assert copy["command"] == [
        "cp",
        "-R",
        f"{image_cache[1]}/.",
        copy["volumeMounts"][0]["mountPath"],
    ]
    assert volume_at(copy, copy["command"][-1]) == volume_at(
        container, env_of(container)["NUMBA_CACHE_DIR"]
    )


# --- the sidecar form --------------------------------------------------------------------------


def inference() -> dict[str, Any]:
    (found,) = pod("sidecar")["containers"]
    return dict(found)


def test_keepset_is_a_native_sidecar_on_loopback_only() -> None:
    spec = pod("sidecar")
    assert all(c["name"] != "keepset" for c in spec["containers"])
    sidecar = keepset_container("sidecar")
    assert sidecar["restartPolicy"] == "Always"
    # The kubelet holds the inference container back until this passes.
    assert "startupProbe" in sidecar and "readinessProbe" in sidecar
    assert setting(sidecar, "host") == "127.0.0.1"
    assert not sidecar.get("ports")


def test_the_socket_is_on_a_volume_both_containers_mount() -> None:
    sidecar = keepset_container("sidecar")
    uds = setting(sidecar, "uds")
    assert uds is not None
    name, inside = volume_at(sidecar, str(uds))
    assert "emptyDir" in volume("sidecar", name)
    caller = {e["name"]: e.get("value") for e in inference()["env"]}
    assert volume_at(inference(), caller["PICKER_SOCKET"]) == (name, inside)
    # The socket is 0660: the caller (another user) gets in through the pod's group.
    assert pod("sidecar")["securityContext"]["fsGroup"]
    assert inference()["securityContext"]["runAsUser"] != sidecar["securityContext"]["runAsUser"]


def test_the_segment_folder_is_memory_both_containers_mount() -> None:
    sidecar = keepset_container("sidecar")
    shm_dir = setting(sidecar, "shm_dir")
    assert shm_dir is not None
    name, inside = volume_at(sidecar, str(shm_dir))
    assert inside == PurePosixPath(".")
    empty_dir = volume("sidecar", name)["emptyDir"]
    assert empty_dir["medium"] == "Memory" and empty_dir["sizeLimit"]
    caller = {e["name"]: e.get("value") for e in inference()["env"]}
    assert volume_at(inference(), caller["PICKER_SHM_DIR"]) == (name, inside)


def test_the_inference_containers_key_is_a_known_client() -> None:
    (ref,) = [e["valueFrom"]["secretKeyRef"] for e in inference()["env"] if "valueFrom" in e]
    key = one("sidecar", "Secret", ref["name"])["stringData"][ref["key"]]
    demo = yaml.safe_load((ROOT / "deploy" / "demo-keys.yaml").read_text())
    client = {v: k for k, v in DEMO_KEYS.items()}[key]
    assert demo["clients"][client]["sha256"] == hashlib.sha256(key.encode()).hexdigest()


# --- the shared-service form -------------------------------------------------------------------


def labels() -> dict[str, str]:
    deployment = one("shared", "Deployment")
    selector: dict[str, str] = deployment["spec"]["selector"]["matchLabels"]
    assert selector.items() <= deployment["spec"]["template"]["metadata"]["labels"].items()
    return selector


def test_the_service_reaches_keepsets_port() -> None:
    container = keepset_container("shared")
    assert one("shared", "Deployment")["spec"]["replicas"] == 2
    (port,) = container["ports"]
    assert port["containerPort"] == setting(container, "port") == KEEPSET_PORT
    service = one("shared", "Service")
    assert service["spec"]["selector"] == labels()
    (service_port,) = service["spec"]["ports"]
    assert service_port["targetPort"] in (port["name"], port["containerPort"])
    assert f"EXPOSE {KEEPSET_PORT}" in CONTAINERFILE.read_text()


def test_replicas_share_the_request_id_secret() -> None:
    # Request ids carry a MAC under KEEPSET_REQUEST_SECRET; replicas with different secrets
    # would refuse each other's ids when an outcome comes back through the Service.
    (entry,) = [
        e for e in keepset_container("shared")["env"] if e["name"] == "KEEPSET_REQUEST_SECRET"
    ]
    assert "request_secret" in Settings.model_fields
    ref = entry["valueFrom"]["secretKeyRef"]
    assert ref["name"] and ref["key"] and ref["optional"] is True


def test_the_autoscaler_disruption_budget_and_spread_hold_keepsets_pods() -> None:
    deployment = one("shared", "Deployment")
    hpa = one("shared", "HorizontalPodAutoscaler")
    assert hpa["apiVersion"] == "autoscaling/v2"
    target = hpa["spec"]["scaleTargetRef"]
    assert (target["kind"], target["name"]) == ("Deployment", deployment["metadata"]["name"])
    assert hpa["spec"]["minReplicas"] >= 2
    (metric,) = hpa["spec"]["metrics"]
    assert metric["resource"]["name"] == "cpu"
    # A utilisation target is a share of the request: without one the autoscaler does nothing.
    assert keepset_container("shared")["resources"]["requests"]["cpu"]
    budget = one("shared", "PodDisruptionBudget")
    assert budget["spec"]["selector"]["matchLabels"] == labels()
    assert budget["spec"].get("minAvailable") == 1 or budget["spec"].get("maxUnavailable") == 1
    spread = pod("shared")["topologySpreadConstraints"]
    assert {s["topologyKey"] for s in spread} == {
        "topology.kubernetes.io/zone",
        "kubernetes.io/hostname",
    }
    assert all(s["labelSelector"]["matchLabels"] == labels() for s in spread)


# --- the image and the README ------------------------------------------------------------------


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
    assert user is not None
    for form in FORMS:
        context = {**pod(form)["securityContext"], **keepset_container(form)["securityContext"]}
        assert context["runAsUser"] == int(user[1])


def test_readme_points_at_the_deploy_files() -> None:
    readme = (ROOT / "README.md").read_text()
    paths = [
        CONTAINERFILE,
        KUBERNETES / "sync_registry.py",
        KUBERNETES / "install-kubectl.sh",
        *(KUBERNETES / "overlays" / form for form in FORMS),
    ]
    for path in paths:
        assert path.exists(), path
        assert str(path.relative_to(ROOT)) in readme, path
    for named in re.findall(r"deploy/[A-Za-z0-9_./-]+[A-Za-z0-9_]", readme):
        assert (ROOT / named).exists(), named


# --- the sidecar's settings, served -------------------------------------------------------------


def files_of_volume(form: str, name: str) -> dict[str, bytes]:
    """What the kubelet would put in a ConfigMap or Secret volume of the rendered pod."""
    source = volume(form, name)
    if "configMap" in source:
        data = one(form, "ConfigMap", source["configMap"]["name"])["data"]
        items = {i["key"]: i["path"] for i in source["configMap"].get("items", [])}
    else:
        data = one(form, "Secret", source["secret"]["secretName"])["stringData"]
        items = {}
    return {items.get(key, key): text.encode() for key, text in data.items()}


def test_the_sidecars_settings_serve_through_its_socket_and_probes() -> None:
    """keepset started with the sidecar's environment, every path moved into a folder standing in
    for its volume: ready on the socket, its probe commands pass (and fail once it is gone), and
    the inference container's settings and key make a pick over socket and shared memory."""
    sidecar, caller = keepset_container("sidecar"), inference()
    pod_root = Path(tempfile.mkdtemp(prefix="ks-pod-", dir="/tmp"))  # a socket path is short
    try:
        for name in {m["name"] for m in sidecar["volumeMounts"]}:
            folder = pod_root / name
            folder.mkdir()
            if "emptyDir" not in volume("sidecar", name):
                mount_like_the_kubelet(folder, files_of_volume("sidecar", name))

        def moved(container: dict[str, Any], value: str) -> str:
            if not value.startswith("/"):
                return value
            name, inside = volume_at(container, value)
            return str(pod_root / name / inside)

        # Not the copied kernel cache: the test's server uses the checkout's, already compiled.
        env = {k: moved(sidecar, v) for k, v in env_of(sidecar).items() if k != "NUMBA_CACHE_DIR"}
        port = env.pop("KEEPSET_PORT")
        server = start_server(
            Path(env.pop("KEEPSET_POLICIES")),
            workers=int(env.pop("KEEPSET_WORKERS")),
            uds=Path(env.pop("KEEPSET_UDS")),
            **env,
        )
        live_port = server.base_url.rsplit(":", 1)[1]

        def probe(name: str) -> int:
            command = [
                sys.executable if part == "python" else part.replace(f":{port}/", f":{live_port}/")
                for part in sidecar[name]["exec"]["command"]
            ]
            return subprocess.run(command, capture_output=True, timeout=30).returncode

        try:
            for name in ("startupProbe", "readinessProbe", "livenessProbe"):
                assert probe(name) == 0, name
            settings = {e["name"]: e.get("value") for e in caller["env"]}
            (ref,) = [e["valueFrom"]["secretKeyRef"] for e in caller["env"] if "valueFrom" in e]
            key = one("sidecar", "Secret", ref["name"])["stringData"][ref["key"]]
            logits = np.random.default_rng(3).standard_normal((2, 1000)).astype(np.float32)
            with Client(
                "http://keepset",
                key=key,
                uds=moved(caller, settings["PICKER_SOCKET"]),
                shm_dir=moved(caller, settings["PICKER_SHM_DIR"]),
            ) as client:
                reply = client.pick(logits, seed=7)
            assert len(reply.tokens) == 2
        finally:
            stop_server(server)
        assert probe("readinessProbe") != 0
    finally:
        shutil.rmtree(pod_root, ignore_errors=True)
