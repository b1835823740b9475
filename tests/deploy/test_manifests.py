"""Checks of the deployment files under ``deploy/``.

Every Kubernetes document is validated against the API's own OpenAPI schemas, as
bundled (offline) by the ``kubernetes-validate`` package, in strict mode so that a
misspelt field fails. On top of the schemas, the tests pin the facts the service relies
on: probes on the health endpoints, a non-root read-only container, selectors that
match, shutdown that outlasts a request, and settings names the service knows. The
Dockerfile and compose.yaml are checked as text and YAML (no container engine needed).
"""

from __future__ import annotations

import math
import pathlib
import re
import shlex
import tomllib
from collections.abc import Iterator
from typing import Any

import kubernetes_validate
import kubernetes_validate.utils
import pytest
import yaml

from service.api.settings import Settings

ROOT = pathlib.Path(__file__).resolve().parents[2]
DEPLOY = ROOT / "deploy"
KUBERNETES = DEPLOY / "kubernetes"
DOCKERFILE = DEPLOY / "Dockerfile"

# A Kubernetes release whose schemas kubernetes-validate bundles (it ships 1.25 onwards).
KUBERNETES_VERSION = "1.32.0"

# The settings the service reads (service.api.settings.Settings, prefix MOVECAST_).
SETTINGS_NAMES = frozenset(f"MOVECAST_{name.upper()}" for name in Settings.model_fields)


# --------------------------------------------------------------------------- loading


def _documents() -> list[tuple[str, dict[str, Any]]]:
    found = []
    for path in sorted(KUBERNETES.glob("*.yaml")):
        with path.open(encoding="utf-8") as stream:
            for document in yaml.safe_load_all(stream):
                if document is not None:
                    found.append((path.name, document))
    return found


DOCUMENTS = _documents()
RESOURCES = [(name, doc) for name, doc in DOCUMENTS if doc["kind"] != "Kustomization"]


def _one(kind: str, *, name: str | None = None) -> dict[str, Any]:
    matches = [
        doc
        for file, doc in RESOURCES
        if doc["kind"] == kind
        and not file.endswith(".example.yaml")
        and (name is None or doc["metadata"]["name"] == name)
    ]
    assert len(matches) == 1, f"expected one {kind}, found {len(matches)}"
    return matches[0]


def _pod_spec() -> dict[str, Any]:
    return _one("Deployment")["spec"]["template"]["spec"]


def _container() -> dict[str, Any]:
    containers = _pod_spec()["containers"]
    assert len(containers) == 1
    return containers[0]


def _pod_labels() -> dict[str, str]:
    return _one("Deployment")["spec"]["template"]["metadata"]["labels"]


def _settings() -> dict[str, str]:
    return _one("ConfigMap", name="movecast-settings")["data"]


def _container_port(port: int | str) -> int:
    """Resolve a probe's or Service's port (number or name) to the container's port."""
    for entry in _container()["ports"]:
        if port in (entry["containerPort"], entry.get("name")):
            return entry["containerPort"]
    raise AssertionError(f"port {port!r} is not a port of the container")


def _cpu(quantity: str) -> float:
    """CPU quantity in cores ("500m" -> 0.5), per the Kubernetes quantity format."""
    return float(quantity[:-1]) / 1000 if quantity.endswith("m") else float(quantity)


_MEMORY_SUFFIXES = {"Ki": 2**10, "Mi": 2**20, "Gi": 2**30, "k": 10**3, "M": 10**6, "G": 10**9}


def _memory(quantity: str) -> int:
    """Memory quantity in bytes ("512Mi" -> 536870912), per the Kubernetes quantity format."""
    for suffix, factor in _MEMORY_SUFFIXES.items():
        if quantity.endswith(suffix):
            return int(float(quantity[: -len(suffix)]) * factor)
    return int(quantity)


# ------------------------------------------------------------------- schema validation


def test_pinned_kubernetes_version_is_bundled() -> None:
    bundled = kubernetes_validate.utils.all_versions()
    assert KUBERNETES_VERSION in bundled, f"kubernetes-validate bundles {bundled}"


@pytest.mark.parametrize("document", [doc for _, doc in RESOURCES], ids=[f"{f}:{d['kind']}" for f, d in RESOURCES])
def test_manifest_matches_the_kubernetes_schema(document: dict[str, Any]) -> None:
    kubernetes_validate.validate(document, KUBERNETES_VERSION, strict=True)


def test_validation_rejects_a_misspelt_field_and_a_wrong_type() -> None:
    # Negative control: the schema check above is not vacuous.
    deployment = yaml.safe_load(yaml.safe_dump(_one("Deployment")))
    deployment["spec"]["replica"] = 2
    with pytest.raises(kubernetes_validate.ValidationError):
        kubernetes_validate.validate(deployment, KUBERNETES_VERSION, strict=True)
    deployment = yaml.safe_load(yaml.safe_dump(_one("Deployment")))
    deployment["spec"]["replicas"] = "two"
    with pytest.raises(kubernetes_validate.ValidationError):
        kubernetes_validate.validate(deployment, KUBERNETES_VERSION, strict=True)


def test_kustomization_lists_every_manifest_except_the_example() -> None:
    kustomizations = [doc for _, doc in DOCUMENTS if doc["kind"] == "Kustomization"]
    assert len(kustomizations) == 1
    listed = kustomizations[0]["resources"]
    expected = {
        path.name
        for path in KUBERNETES.glob("*.yaml")
        if path.name != "kustomization.yaml" and not path.name.endswith(".example.yaml")
    }
    assert sorted(listed) == sorted(expected)
    assert [f for f, _ in RESOURCES if f.endswith(".example.yaml")], "no example Secret"


def test_manifests_are_namespace_agnostic() -> None:
    for file, document in RESOURCES:
        assert "namespace" not in document["metadata"], file
        assert document["kind"] != "Namespace", file


# ---------------------------------------------------------------- facts we rely on


def test_probes_point_at_the_health_endpoints_on_the_container_port() -> None:
    container = _container()
    for probe, path in (
        ("startupProbe", "/healthz"),
        ("livenessProbe", "/healthz"),
        ("readinessProbe", "/readyz"),
    ):
        check = container[probe]["httpGet"]
        assert check["path"] == path, probe
        assert _container_port(check["port"]) == 8000, probe
    # The server listens where the probes look.
    assert int(_settings()["MOVECAST_PORT"]) == 8000
    assert _settings()["MOVECAST_HOST"] == "0.0.0.0"


def test_resources_have_requests_and_limits() -> None:
    resources = _container()["resources"]
    for name in ("cpu", "memory"):
        assert name in resources["requests"] and name in resources["limits"], name
    assert _cpu(resources["requests"]["cpu"]) <= _cpu(resources["limits"]["cpu"])
    assert _memory(resources["requests"]["memory"]) <= _memory(resources["limits"]["memory"])
    # Common practice: no more worker processes than the CPU limit has cores.
    assert int(_settings()["MOVECAST_WORKERS"]) <= math.ceil(_cpu(resources["limits"]["cpu"]))


def test_pod_runs_as_the_image_user_without_privileges() -> None:
    pod, container = _pod_spec(), _container()
    assert pod["securityContext"]["runAsNonRoot"] is True
    assert pod["securityContext"]["runAsUser"] == _image_user() != 0
    context = container["securityContext"]
    assert context["readOnlyRootFilesystem"] is True
    assert context["allowPrivilegeEscalation"] is False
    assert context["capabilities"]["drop"] == ["ALL"]
    assert pod["automountServiceAccountToken"] is False
    # The only writable path is an emptyDir on /tmp.
    volumes = {volume["name"]: volume for volume in pod["volumes"]}
    mounts = {mount["mountPath"]: mount["name"] for mount in container["volumeMounts"]}
    assert "emptyDir" in volumes[mounts["/tmp"]]


def test_termination_outlasts_the_drain_pause_and_the_longest_request() -> None:
    command = _container()["lifecycle"]["preStop"]["exec"]["command"]
    assert command[0] == "sleep"
    pause = float(command[1])
    timeout = float(_settings()["MOVECAST_REQUEST_TIMEOUT_SECONDS"])
    assert _pod_spec()["terminationGracePeriodSeconds"] > pause + timeout


def test_deployment_selector_matches_its_pods() -> None:
    selector = _one("Deployment")["spec"]["selector"]["matchLabels"]
    assert selector.items() <= _pod_labels().items()


def test_service_selects_the_pods_and_forwards_80_to_the_container_port() -> None:
    spec = _one("Service")["spec"]
    assert spec["type"] == "ClusterIP"
    assert spec["selector"] and spec["selector"].items() <= _pod_labels().items()
    (port,) = spec["ports"]
    assert port["port"] == 80
    assert _container_port(port["targetPort"]) == 8000


def test_autoscaler_targets_the_deployment_on_cpu() -> None:
    deployment, spec = _one("Deployment"), _one("HorizontalPodAutoscaler")["spec"]
    target = spec["scaleTargetRef"]
    assert (target["apiVersion"], target["kind"], target["name"]) == (
        deployment["apiVersion"],
        "Deployment",
        deployment["metadata"]["name"],
    )
    (metric,) = spec["metrics"]
    assert metric["type"] == "Resource" and metric["resource"]["name"] == "cpu"
    assert metric["resource"]["target"]["type"] == "Utilization"
    # Utilisation is relative to the CPU request, so the request must be there.
    assert "cpu" in _container()["resources"]["requests"]
    assert 2 <= spec["minReplicas"] <= deployment["spec"]["replicas"] <= spec["maxReplicas"]


def test_disruption_budget_selects_the_pods_and_keeps_one_serving() -> None:
    spec = _one("PodDisruptionBudget")["spec"]
    assert spec["selector"]["matchLabels"].items() <= _pod_labels().items()
    minimum = _one("HorizontalPodAutoscaler")["spec"]["minReplicas"]
    assert spec["maxUnavailable"] < minimum


def test_settings_are_names_the_service_reads() -> None:
    assert set(_settings()) <= SETTINGS_NAMES, set(_settings()) - SETTINGS_NAMES
    container = _container()
    assert {"configMapRef": {"name": "movecast-settings"}} in container["envFrom"]
    names = {entry["name"] for entry in container.get("env", [])}
    assert names <= SETTINGS_NAMES, names - SETTINGS_NAMES


def test_api_keys_come_from_an_optional_secret_shaped_like_the_example() -> None:
    (entry,) = [e for e in _container()["env"] if e["name"] == "MOVECAST_API_KEYS"]
    reference = entry["valueFrom"]["secretKeyRef"]
    assert reference["optional"] is True
    (example,) = [doc for file, doc in RESOURCES if file.endswith(".example.yaml")]
    assert example["kind"] == "Secret"
    assert example["metadata"]["name"] == reference["name"]
    assert "replace" in example["stringData"][reference["key"]]
    assert "MOVECAST_API_KEYS" not in _settings(), "keys belong in the Secret"


# ------------------------------------------------------------------------ Dockerfile


def _instructions() -> Iterator[tuple[str, str]]:
    """(INSTRUCTION, arguments) pairs, with line continuations joined, comments dropped."""
    pending = ""
    for raw in DOCKERFILE.read_text(encoding="utf-8").splitlines():
        line = raw.strip()
        if line.startswith("#") or not line:
            continue
        if line.endswith("\\"):
            pending += line[:-1] + " "
            continue
        keyword, _, arguments = (pending + line).partition(" ")
        pending = ""
        yield keyword.upper(), arguments.strip()
    assert not pending, "Dockerfile ends inside a continued line"


def _stages() -> list[list[tuple[str, str]]]:
    stages: list[list[tuple[str, str]]] = []
    for keyword, arguments in _instructions():
        if keyword == "FROM":
            stages.append([])
        if stages:
            stages[-1].append((keyword, arguments))
    return stages


def _runtime(keyword: str) -> list[str]:
    return [arguments for key, arguments in _stages()[-1] if key == keyword]


def _image_user() -> int:
    user = _runtime("USER")[-1]
    assert re.fullmatch(r"\d+(:\d+)?", user), "USER must be numeric for runAsNonRoot"
    return int(user.split(":")[0])


def _image_env() -> dict[str, str]:
    pairs = [item.split("=", 1) for env in _runtime("ENV") for item in shlex.split(env)]
    return dict(pairs)


def test_dockerfile_builds_in_stages_and_installs_only_wheels() -> None:
    stages = _stages()
    assert len(stages) >= 2
    assert "-slim" in stages[-1][0][1], "runtime stage on a slim base"
    (install,) = [a for a in _runtime("RUN") if "pip install" in a]
    assert "--no-index" in install and "from=builder" in install
    assert not [a for a in _runtime("COPY") if not a.startswith("--from")], "no source copied"


def test_dockerfile_runs_as_a_non_root_user() -> None:
    assert _image_user() != 0
    assert "root" not in _runtime("USER")[-1]


def test_dockerfile_health_check_calls_healthz_with_python() -> None:
    (check,) = _runtime("HEALTHCHECK")
    assert "CMD python" in check and "/healthz" in check
    assert "curl" not in check and "wget" not in check


def test_dockerfile_serves_with_settings_from_the_environment() -> None:
    (command,) = _runtime("CMD")
    # exec form, no shell: the server is PID 1 and gets SIGTERM; it reads its variables itself
    assert command == '["movecast", "serve"]'
    env = _image_env()
    assert env["MOVECAST_HOST"] == "0.0.0.0"
    assert env["OMP_NUM_THREADS"] == env["OPENBLAS_NUM_THREADS"] == "1"
    assert {name for name in env if name.startswith("MOVECAST_")} <= SETTINGS_NAMES
    assert _runtime("EXPOSE") == [env["MOVECAST_PORT"]] == ["8000"]
    assert _runtime("STOPSIGNAL") == ["SIGTERM"]


def test_build_context_holds_everything_the_wheel_build_reads() -> None:
    copied: set[str] = set()
    for arguments in (a for key, a in _stages()[0] if key == "COPY"):
        sources = shlex.split(arguments)[:-1]
        copied.update(s.rstrip("/") for s in sources if not s.startswith("--"))
    project = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))
    wheel = project["tool"]["hatch"]["build"]["targets"]["wheel"]
    needed = {"pyproject.toml", project["project"]["readme"], *wheel["packages"]}
    needed |= {path.split("/")[0] for path in wheel.get("force-include", {})}
    assert needed <= copied, needed - copied
    ignore = (DEPLOY / "Dockerfile.dockerignore").read_text(encoding="utf-8").splitlines()
    assert ignore[ignore.index("*") + 1 :], "allow-list after '*'"
    assert {f"!{source}" for source in copied} <= set(ignore)


# -------------------------------------------------------------------------- compose


def _compose_service() -> dict[str, Any]:
    compose = yaml.safe_load((DEPLOY / "compose.yaml").read_text(encoding="utf-8"))
    (service,) = compose["services"].values()
    return service


def _seconds(duration: str) -> float:
    """Compose duration ("45s", "1m30s") in seconds."""
    units = {"h": 3600, "m": 60, "s": 1}
    parts = re.findall(r"(\d+(?:\.\d+)?)([hms])", duration)
    assert "".join(n + u for n, u in parts) == duration, duration
    return sum(float(n) * units[u] for n, u in parts)


def test_the_image_runs_as_many_workers_as_the_deployments_are_sized_for() -> None:
    # the compose file's and the pod's memory limits hold one worker's processes at their caps
    # (tests/api/test_memory_bound.py); the image's own default had been two workers
    compose_default = re.fullmatch(
        r"\$\{MOVECAST_WORKERS:-(\d+)\}", str(_compose_service()["environment"]["MOVECAST_WORKERS"])
    )
    assert compose_default is not None
    assert _image_env()["MOVECAST_WORKERS"] == compose_default.group(1) == _settings()["MOVECAST_WORKERS"] == "1"


def test_compose_builds_the_dockerfile_from_the_repository_root() -> None:
    build = _compose_service()["build"]
    context = (DEPLOY / build["context"]).resolve()
    assert context == ROOT
    assert (context / build["dockerfile"]).resolve() == DOCKERFILE


def test_compose_service_is_hardened_and_checked() -> None:
    service = _compose_service()
    environment = service["environment"]
    assert set(environment) <= SETTINGS_NAMES, set(environment) - SETTINGS_NAMES
    port = environment["MOVECAST_PORT"]
    assert any(str(mapping).endswith(f":{port}") for mapping in service["ports"])
    check = " ".join(service["healthcheck"]["test"])
    assert f"127.0.0.1:{port}/healthz" in check and "curl" not in check
    assert service["read_only"] is True
    assert any(entry.split(":")[0] == "/tmp" for entry in service["tmpfs"])
    assert service["cap_drop"] == ["ALL"]
    assert service["restart"] in {"always", "unless-stopped", "on-failure"}
    timeout = float(environment["MOVECAST_REQUEST_TIMEOUT_SECONDS"])
    assert _seconds(service["stop_grace_period"]) > timeout


def test_compose_reads_api_keys_from_a_file_secret_kept_out_of_git() -> None:
    compose = yaml.safe_load((DEPLOY / "compose.yaml").read_text(encoding="utf-8"))
    service = _compose_service()
    (name,) = service["secrets"]
    assert service["environment"]["MOVECAST_API_KEYS_FILE"] == f"/run/secrets/{name}"
    secret_file = pathlib.PurePosixPath(compose["secrets"][name]["file"])
    ignored = (DEPLOY / ".gitignore").read_text(encoding="utf-8").splitlines()
    assert f"{secret_file.parts[-2]}/" in ignored


@pytest.mark.parametrize(("name", "value"), [("MOVECAST_WORKERS", "two"), ("MOVECAST_PORT", "")])
def test_the_image_command_names_a_bad_variable(name, value, tmp_path):
    """The image's CMD, run here as the container would (exec form, or the shell of the shell form).

    The container is configured by its variables only, so a bad one must be reported by its
    name; passing them on as options had the options' parser answer instead
    ("argument --workers: invalid int value").
    """
    import json
    import os
    import subprocess
    import sys

    (command,) = _runtime("CMD")
    argv = json.loads(command)
    bin_dir = pathlib.Path(sys.executable).parent
    assert (bin_dir / "movecast").exists(), "the project's console script is installed"
    env = {**_image_env(), "PATH": f"{bin_dir}{os.pathsep}{os.environ.get('PATH', '')}", name: value}
    env["MOVECAST_API_KEYS_FILE"] = str(tmp_path / "absent")  # even a valid rest stops before serving
    done = subprocess.run(argv, env=env, capture_output=True, text=True, timeout=120, check=False)
    assert done.returncode == 2, done.stderr
    assert f"  {name}: " in done.stderr, done.stderr


def test_every_setting_is_in_the_readme_and_every_documented_variable_is_a_setting() -> None:
    """Both ways: an operator finds every setting in the README, and each MOVECAST_ name written in
    the README, DEVELOPERS.md or deploy/ is one the service reads (MOVECAST_CHROMIUM is the
    browser tests' own, not the service's)."""
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    assert not {name for name in SETTINGS_NAMES if f"`{name}`" not in readme}
    documents = [ROOT / "README.md", ROOT / "DEVELOPERS.md", *DEPLOY.rglob("*.yaml"), DOCKERFILE]
    for path in documents:
        named = set(re.findall(r"MOVECAST_[A-Z0-9_]*[A-Z0-9]", path.read_text(encoding="utf-8")))
        assert named - SETTINGS_NAMES - {"MOVECAST_CHROMIUM"} == set(), path.name
