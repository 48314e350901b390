"""The deploy kit: deploy/Dockerfile and deploy/k8s/, checked offline.

There is no Docker engine or cluster here: the Dockerfile is parsed and checked against the
repository, and every Kubernetes manifest is validated against the Kubernetes JSON schemas
that the ``kubernetes-validate`` package ships.
"""

from __future__ import annotations

import copy
import json
import re
import shlex
import tomllib
from pathlib import Path

import kubernetes_validate
import pytest
import yaml

from service.config import parse_config
from service.httpserver import parse_listen

REPO = Path(__file__).resolve().parent.parent
K8S = REPO / "deploy" / "k8s"
DOCKERFILE = REPO / "deploy" / "Dockerfile"
EXAMPLE_CONFIG = REPO / "config" / "tidewatch.example.toml"

# 1.30: a release still widely run when this was written (from memory); 1.37 is the newest
# schema set kubernetes-validate 1.37.0 ships. Strict mode rejects unknown fields.
K8S_VERSIONS = ["1.30.0", "1.37.0"]


def _manifests() -> list[tuple[str, dict]]:
    out = []
    for path in sorted(K8S.glob("*.yaml")):
        for doc in yaml.safe_load_all(path.read_text()):
            if doc:
                out.append((path.name, doc))
    return out


def _one(kind: str) -> dict:
    found = [doc for _, doc in _manifests() if doc["kind"] == kind]
    assert len(found) == 1, f"expected one {kind}, found {len(found)}"
    return found[0]


def _container() -> dict:
    [c] = _one("Deployment")["spec"]["template"]["spec"]["containers"]
    return c


def _configmap_toml() -> str:
    cm = _one("ConfigMap")
    return cm["data"]["tidewatch.toml"]


# --- schema validation ---------------------------------------------------------------


def test_the_kit_has_the_expected_resources():
    kinds = sorted(doc["kind"] for _, doc in _manifests())
    assert kinds == ["ConfigMap", "Deployment", "PodDisruptionBudget", "Service"]


@pytest.mark.parametrize("version", K8S_VERSIONS)
@pytest.mark.parametrize("name,doc", _manifests(), ids=[f"{n}:{d['kind']}" for n, d in _manifests()])
def test_manifest_validates_against_the_kubernetes_schema(name, doc, version):
    # SchemaNotFoundError (an unknown kind or apiVersion) fails the test as well.
    kubernetes_validate.validate(doc, version, strict=True)


@pytest.mark.parametrize(
    "breakage",
    [
        lambda d: d["spec"].__setitem__("replicas", "three"),
        lambda d: d["spec"]["template"]["spec"]["containers"][0].__setitem__("livenesProbe", {}),
        lambda d: d["spec"]["template"]["spec"]["containers"][0]["ports"][0].__setitem__("containerPort", "metrics"),
    ],
    ids=["replicas-as-string", "misspelt-field", "port-as-string"],
)
def test_the_validator_rejects_a_broken_deployment(breakage):
    # Shows the schema check can fail: each of these is a mistake a cluster would refuse.
    doc = copy.deepcopy(_one("Deployment"))
    breakage(doc)
    with pytest.raises(kubernetes_validate.ValidationError):
        kubernetes_validate.validate(doc, K8S_VERSIONS[0], strict=True)


# --- the ConfigMap's config file -------------------------------------------------------


def test_configmap_config_parses_with_tidewatch_config():
    cfg = parse_config(_configmap_toml(), "configmap.yaml:tidewatch.toml", environ={})
    assert cfg.kafka is not None
    raw = tomllib.loads(_configmap_toml())["kafka"]
    # the keys the deployment depends on are written out, not left to defaults
    assert {"bootstrap_servers", "input_topics", "output_topic", "group_id"} <= set(raw)
    assert cfg.kafka.instance_id is None, "the instance id comes from the pod name, not the shared file"
    assert cfg.settings_for("ticket-api").window == 300.0  # the example's rules came along


def test_configmap_config_is_the_example_plus_the_cluster_settings():
    example = parse_config(EXAMPLE_CONFIG.read_text(), str(EXAMPLE_CONFIG), environ={})
    cluster = parse_config(_configmap_toml(), "configmap", environ={})
    assert cluster.defaults == example.defaults
    assert cluster.rules == example.rules
    # the one cluster-specific limit: live models sized to the pod's memory limit
    assert cluster.limits.model_copy(update={"max_live_models": example.limits.max_live_models}) == example.limits
    assert cluster.state.checkpoint_interval == example.state.checkpoint_interval


def _bytes(quantity: str) -> int:
    units = {"Ki": 1 << 10, "Mi": 1 << 20, "Gi": 1 << 30}
    return int(quantity[:-2]) * units[quantity[-2:]]


def test_live_models_fit_the_memory_limit_and_spilled_ones_fit_tmp():
    """About 85 KiB a live model and 40 KB a spilled one at the defaults (BENCHMARKS.md, bench_memory.py)."""
    cfg = parse_config(_configmap_toml(), "configmap", environ={})
    c = _container()
    assert cfg.limits.max_live_models * 85 * 1024 < 0.8 * _bytes(c["resources"]["limits"]["memory"])
    volumes = {v["name"]: v for v in _one("Deployment")["spec"]["template"]["spec"]["volumes"]}
    spilled = (cfg.limits.max_services - cfg.limits.max_live_models) * 40_000
    assert spilled < _bytes(volumes["tmp"]["emptyDir"]["sizeLimit"])


def test_http_listen_is_reachable_on_the_container_port():
    cfg = parse_config(_configmap_toml(), "configmap", environ={})
    host, port = parse_listen(cfg.http.listen)
    # 127.0.0.1 inside a pod is unreachable for the kubelet's probes and for Prometheus
    assert host in ("0.0.0.0", "::", "")
    [p] = _container()["ports"]
    assert (p["name"], p["containerPort"]) == ("metrics", port) == ("metrics", 9464)


# --- the Deployment ------------------------------------------------------------------


def test_deployment_sets_the_instance_id_from_the_pod_name():
    env = {e["name"]: e for e in _container()["env"]}
    assert env["TIDEWATCH_KAFKA_INSTANCE_ID"]["valueFrom"] == {"fieldRef": {"fieldPath": "metadata.name"}}
    key = env["TIDEWATCH_STATE_KEY"]["valueFrom"]["secretKeyRef"]
    assert key["optional"] is True


def test_deployment_probes_and_resources():
    c = _container()
    assert c["livenessProbe"]["httpGet"] == {"path": "/healthz", "port": "metrics"}
    assert c["readinessProbe"]["httpGet"] == {"path": "/readyz", "port": "metrics"}
    assert c["startupProbe"]["httpGet"]["path"] == "/healthz"
    assert c["resources"] == {"requests": {"cpu": "500m", "memory": "512Mi"}, "limits": {"cpu": "1", "memory": "1Gi"}}


def test_deployment_mounts_the_configmap_where_the_args_look():
    dep = _one("Deployment")
    c = _container()
    args = c["args"]
    config_path = Path(args[args.index("--config") + 1])
    volumes = {v["name"]: v for v in dep["spec"]["template"]["spec"]["volumes"]}
    [mount] = [m for m in c["volumeMounts"] if m["mountPath"] == str(config_path.parent)]
    assert volumes[mount["name"]]["configMap"]["name"] == _one("ConfigMap")["metadata"]["name"]
    assert config_path.name in _one("ConfigMap")["data"]
    # the writable places of a read-only root filesystem
    assert c["securityContext"]["readOnlyRootFilesystem"] is True
    cfg = parse_config(_configmap_toml(), "configmap", environ={})
    assert any(Path(cfg.state.dir).is_relative_to(m["mountPath"]) for m in c["volumeMounts"])


def test_deployment_runs_as_the_images_non_root_user():
    pod = _one("Deployment")["spec"]["template"]["spec"]["securityContext"]
    assert pod["runAsNonRoot"] is True
    user = _dockerfile_instructions("USER")[-1].split(":")[0]
    assert str(pod["runAsUser"]) == user


def test_service_and_pdb_select_the_deployments_pods():
    labels = _one("Deployment")["spec"]["template"]["metadata"]["labels"]
    assert _one("Deployment")["spec"]["selector"]["matchLabels"].items() <= labels.items()
    svc = _one("Service")
    assert svc["spec"]["selector"].items() <= labels.items()
    assert _one("PodDisruptionBudget")["spec"]["selector"]["matchLabels"].items() <= labels.items()
    [port] = svc["spec"]["ports"]
    assert (port["port"], port["targetPort"]) == (9464, "metrics")
    ann = svc["metadata"]["annotations"]
    # annotation-based discovery convention (common practice)
    assert ann["prometheus.io/scrape"] == "true" and ann["prometheus.io/port"] == "9464"
    assert ann["prometheus.io/path"] == "/metrics"


def test_readme_explains_scaling_and_the_instance_id():
    text = (K8S / "README.md").read_text()
    for needle in ("tidewatch_consumer_lag_messages", "partitions", "consumer group", "StatefulSet",
                   "TIDEWATCH_KAFKA_INSTANCE_ID", "fence"):
        assert needle in text, needle


# --- the Dockerfile --------------------------------------------------------------------


def _dockerfile() -> list[tuple[str, str]]:
    """(INSTRUCTION, arguments) pairs, continuation lines joined, comments dropped."""
    out: list[tuple[str, str]] = []
    pending = ""
    for line in DOCKERFILE.read_text().splitlines():
        stripped = line.strip()
        if not pending and (not stripped or stripped.startswith("#")):
            continue
        if stripped.endswith("\\"):
            pending += stripped[:-1] + " "
            continue
        full = (pending + stripped).strip()
        pending = ""
        instr, _, args = full.partition(" ")
        out.append((instr.upper(), args.strip()))
    assert not pending, "a continuation line runs off the end of the Dockerfile"
    return out


def _dockerfile_instructions(name: str) -> list[str]:
    return [args for instr, args in _dockerfile() if instr == name]


def _exec_form(args: str) -> list[str]:
    value = json.loads(args)
    assert isinstance(value, list) and all(isinstance(v, str) for v in value), args
    return value


def test_dockerfile_base_image_entrypoint_and_port():
    assert _dockerfile_instructions("FROM") == ["python:3.11-slim"]
    assert _exec_form(_dockerfile_instructions("ENTRYPOINT")[-1]) == ["tidewatch"]
    assert _dockerfile_instructions("EXPOSE") == ["9464"]
    cmd = _exec_form(_dockerfile_instructions("CMD")[-1])
    assert cmd[0] == "run" and cmd[cmd.index("--listen") + 1] == "0.0.0.0:9464"
    assert any("pip install ." in r for r in _dockerfile_instructions("RUN"))


def test_dockerfile_compiles_the_c_extensions_and_fails_if_they_do_not():
    # The extension is optional at install time, so only an import after the install shows that the
    # image got it; the compiler goes in the same layer it is removed from.
    [step] = [r for r in _dockerfile_instructions("RUN") if "pip install ." in r]
    assert step.index("apt-get install") < step.index("gcc") < step.index("pip install .")
    ext = tomllib.loads((REPO / "pyproject.toml").read_text())["tool"]["setuptools"]["ext-modules"]
    names = sorted(m["name"] for m in ext)
    assert names == ["models._baselinecore", "models._hstcore", "service._hotpath", "service._scoremsg"]
    assert all((REPO / src).exists() for m in ext for src in m["sources"])
    # every extension pyproject.toml declares is imported after the install, before the compiler goes
    check = step[step.index("pip install ."):step.index("apt-get purge")]
    [imported] = re.findall(r'python -c "import ([^"]+)"', check)
    assert sorted(n.strip() for n in imported.split(",")) == names


def test_dockerfile_runs_as_a_non_root_user():
    users = _dockerfile_instructions("USER")
    assert users, "no USER: the container would run as root"
    # the last USER decides who ENTRYPOINT runs as, and it comes before it
    instructions = [i for i, _ in _dockerfile()]
    last_user = max(i for i, name in enumerate(instructions) if name == "USER")
    assert last_user < instructions.index("ENTRYPOINT")
    user, _, group = users[-1].partition(":")
    assert user not in ("root", "0") and group not in ("root", "0")
    # the uid is created in the image
    assert any(f"--uid {user}" in r for r in _dockerfile_instructions("RUN"))


def test_dockerfile_healthcheck_asks_healthz_with_python_urllib():
    [check] = _dockerfile_instructions("HEALTHCHECK")
    options, _, command = check.partition("CMD")
    assert "--interval=" in options and "--timeout=" in options
    argv = _exec_form(command.strip())
    assert argv[:2] == ["python", "-c"]
    code = argv[2]
    compile(code, "<healthcheck>", "exec")  # valid Python
    assert "urllib.request" in code and "http://127.0.0.1:9464/healthz" in code and "timeout=" in code


def test_every_copy_source_exists_in_the_repository():
    copies = _dockerfile_instructions("COPY")
    assert copies
    for args in copies:
        parts = shlex.split(args)
        assert not any(p.startswith("--from") for p in parts), "no multi-stage copies expected"
        *sources, _dest = [p for p in parts if not p.startswith("--")]
        for src in sources:
            assert (REPO / src).exists(), f"COPY {src}: not in the repository (the build context is the repo root)"


def test_copied_files_are_what_pip_install_needs():
    copied = set()
    for args in _dockerfile_instructions("COPY"):
        *sources, _ = [p for p in shlex.split(args) if not p.startswith("--")]
        copied |= {s.rstrip("/") for s in sources}
    project = tomllib.loads((REPO / "pyproject.toml").read_text())
    assert "pyproject.toml" in copied
    assert project["project"]["readme"] in copied
    assert "LICENSE" in copied
    for pattern in project["tool"]["setuptools"]["packages"]["find"]["include"]:
        package = pattern.rstrip("*")
        assert package in copied, f"package {package} is not copied into the image"
