"""deploy/kubernetes and deploy/otel-collector: every manifest validated offline against the
Kubernetes schemas by kubernetes-validate (PyPI; strict: unknown fields are errors), at the
oldest Kubernetes these files ask for (1.29: native sidecars) and the newest it knows; every
tracewatch config inside a ConfigMap through ``tracewatch check-config``; and what no schema
sees: that selectors, names, ports, mounts and paths agree from one object to the next, that
every container is locked down, and that the Collector configs are well-formed and route
traces to the StatefulSet's pods.

The Collector configs are not run: no Collector binary is available here (Debian and PyPI ship
none), so only their structure is checked (README says so)."""

from __future__ import annotations

from pathlib import Path

import pytest
import yaml

from tracewatch.config import load_config

from .conftest import ROOT, run_cli

K8S = ROOT / "deploy" / "kubernetes"
GATEWAY = ROOT / "deploy" / "otel-collector" / "loadbalancing.yaml"
MANIFESTS = sorted(K8S.glob("*.yaml"))
VERSIONS = ["1.29.0", "1.37.0"]
WORKLOADS = ("DaemonSet", "StatefulSet", "Deployment")


def documents() -> list[dict]:
    return [doc for path in MANIFESTS for doc in yaml.safe_load_all(path.read_text()) if doc]


def find(kind: str, name: str, namespace: str) -> dict:
    for doc in documents():
        if doc["kind"] == kind and doc["metadata"]["name"] == name and doc["metadata"].get("namespace") == namespace:
            return doc
    raise AssertionError(f"no {kind} {namespace}/{name} in deploy/kubernetes")


def workloads() -> list[dict]:
    return [d for d in documents() if d["kind"] in WORKLOADS]


def pod_containers(spec: dict) -> list[dict]:
    return spec.get("initContainers", []) + spec["containers"]


def tracewatch_container(spec: dict) -> dict:
    (c,) = [c for c in pod_containers(spec) if c["image"].split("/")[-1].startswith("tracewatch:")]
    return c


def selects(selector: dict, labels: dict) -> bool:
    return all(labels.get(k) == v for k, v in selector.items())


@pytest.mark.parametrize("path", MANIFESTS, ids=[p.name for p in MANIFESTS])
def test_manifest_is_valid_against_the_kubernetes_schemas(path):
    kv = pytest.importorskip("kubernetes_validate", reason="kubernetes-validate (PyPI, in the test extras) "
                             "is not installed: `make .venv/.installed-test` installs it")
    docs = [d for d in yaml.safe_load_all(path.read_text()) if d]
    assert docs
    for doc in docs:
        for version in VERSIONS:
            try:
                kv.validate(doc, version, strict=True)
            except kv.ValidationError as exc:
                raise AssertionError(f"{path.name}: {doc['kind']} {doc['metadata']['name']} "
                                     f"(Kubernetes {version}): {exc}") from exc


def test_the_kubernetes_validator_is_live():
    """A misspelt field and a wrong type are refused: the check above can fail."""
    kv = pytest.importorskip("kubernetes_validate", reason="kubernetes-validate is not installed")
    broken = find("DaemonSet", "tracewatch-node", "tracewatch")
    broken["spec"]["template"]["spec"]["containers"][0]["readOnlyRootFileSystem"] = True
    with pytest.raises(kv.ValidationError):
        kv.validate(broken, VERSIONS[-1], strict=True)
    broken = find("StatefulSet", "tracewatch-traces", "tracewatch")
    broken["spec"]["replicas"] = "three"
    with pytest.raises(kv.ValidationError):
        kv.validate(broken, VERSIONS[-1], strict=True)


def configmap_configs() -> list[tuple[str, str, dict]]:
    """(namespace, ConfigMap name, {key: text}) of each ConfigMap holding a tracewatch config."""
    return [(d["metadata"]["namespace"], d["metadata"]["name"], d["data"]) for d in documents()
            if d["kind"] == "ConfigMap" and "tracewatch.toml" in d["data"]]


@pytest.mark.parametrize("workload", workloads(), ids=lambda w: f"{w['kind']}-{w['metadata']['name']}")
def test_workload_and_the_config_it_mounts_agree(workload, tmp_path):
    """check-config passes on the config the pod mounts; the pod writes its state where its
    volume is, reads its logs from read-only mounts, listens on all pod addresses on the port the
    probes and Prometheus use, and gets its baselines read-only from the shared volume."""
    meta, spec = workload["metadata"], workload["spec"]["template"]["spec"]
    tw = tracewatch_container(spec)
    assert tw["args"][:2] == ["run", "--config"]
    config_path = Path(tw["args"][2])
    mounts = {m["mountPath"]: m for m in tw["volumeMounts"]}
    volumes = {v["name"]: v for v in spec["volumes"]}
    config_volume = volumes[mounts[str(config_path.parent)]["name"]]
    configmap = find("ConfigMap", config_volume["configMap"]["name"], meta["namespace"])
    local = tmp_path / config_path.name
    local.write_text(configmap["data"][config_path.name])
    run_cli("check-config", "--config", str(local), check=True)
    cfg = load_config(local)

    state = mounts[str(cfg.state_dir)]
    assert not state.get("readOnly")
    claims = {c["metadata"]["name"] for c in workload["spec"].get("volumeClaimTemplates", [])}
    assert state["name"] in claims or "emptyDir" in volumes[state["name"]]
    baselines = mounts[f"{cfg.state_dir}/baselines"]
    assert baselines["readOnly"]
    claim = volumes[baselines["name"]]["persistentVolumeClaim"]
    assert claim["readOnly"]
    find("PersistentVolumeClaim", claim["claimName"], meta["namespace"])
    for src in cfg.sources:
        for pattern in src.paths:
            holders = [m for path, m in mounts.items() if pattern.startswith(path + "/")]
            assert holders and all(m.get("readOnly") for m in holders), pattern

    host, port = cfg.server.listen.rsplit(":", 1)
    assert host == "0.0.0.0"
    (metrics_port,) = [p for p in tw["ports"] if p["containerPort"] == int(port)]
    annotations = workload["spec"]["template"]["metadata"]["annotations"]
    assert annotations["prometheus.io/scrape"] == "true" and annotations["prometheus.io/port"] == port
    assert tw["livenessProbe"]["httpGet"] == {"path": "/healthz", "port": metrics_port["name"]}
    if workload["kind"] == "Deployment":  # the sidecar: its readiness would be the app's (sidecar.yaml)
        assert tw["restartPolicy"] == "Always" and tw in spec["initContainers"]
        assert "readinessProbe" not in tw and "startupProbe" not in tw
    else:
        assert tw["readinessProbe"]["httpGet"] == {"path": "/readyz", "port": metrics_port["name"]}
        assert tw["startupProbe"]["httpGet"]["path"] == "/healthz"


@pytest.mark.parametrize("workload", workloads(), ids=lambda w: f"{w['kind']}-{w['metadata']['name']}")
def test_every_container_is_locked_down_and_bounded(workload):
    spec = workload["spec"]["template"]["spec"]
    pod_sc = spec["securityContext"]
    assert pod_sc["seccompProfile"] == {"type": "RuntimeDefault"}
    assert pod_sc["runAsNonRoot"] and pod_sc["runAsUser"] > 0
    assert spec["automountServiceAccountToken"] is False
    for c in pod_containers(spec):
        sc = c["securityContext"]
        assert sc["allowPrivilegeEscalation"] is False and sc["readOnlyRootFilesystem"] is True, c["name"]
        assert sc["capabilities"] == {"drop": ["ALL"]} and sc["runAsNonRoot"], c["name"]
        assert c["resources"]["requests"]["memory"] and c["resources"]["limits"]["memory"], c["name"]
    host_paths = [v for v in spec["volumes"] if "hostPath" in v]
    if workload["kind"] == "DaemonSet":
        assert {v["hostPath"]["path"] for v in host_paths} == {"/var/log/pods", "/var/log/containers"}
        tw = tracewatch_container(spec)
        for v in host_paths:
            (m,) = [m for m in tw["volumeMounts"] if m["name"] == v["name"]]
            assert m["readOnly"] and m["mountPath"] == v["hostPath"]["path"]  # the links resolve
    else:
        assert not host_paths


def test_services_policies_and_budgets_select_real_pods():
    pods = [(w["metadata"]["namespace"], w["spec"]["template"]["metadata"]["labels"], w) for w in workloads()]
    for doc in documents():
        ns = doc["metadata"].get("namespace")
        if doc["kind"] == "Service":
            (w,) = [w for n, labels, w in pods if n == ns and selects(doc["spec"]["selector"], labels)]
            assert doc["spec"]["clusterIP"] == "None"  # one endpoint per pod: every daemon scraped
            assert doc["metadata"]["annotations"]["prometheus.io/scrape"] == "true"
            named = {p["name"] for c in pod_containers(w["spec"]["template"]["spec"]) for p in c.get("ports", [])}
            assert {p["targetPort"] for p in doc["spec"]["ports"]} <= named
        elif doc["kind"] in ("NetworkPolicy", "PodDisruptionBudget"):
            selector = doc["spec"]["podSelector" if doc["kind"] == "NetworkPolicy" else "selector"]["matchLabels"]
            assert [w for n, labels, w in pods if n == ns and selects(selector, labels)], doc["metadata"]["name"]
    sts = find("StatefulSet", "tracewatch-traces", "tracewatch")
    assert find("Service", sts["spec"]["serviceName"], "tracewatch")["spec"]["clusterIP"] == "None"
    assert find("PodDisruptionBudget", "tracewatch-traces", "tracewatch")["spec"]["maxUnavailable"] == 1
    for name in ("tracewatch-node", "tracewatch-traces"):  # only Prometheus (and the Collector) get in
        policy = find("NetworkPolicy", name, "tracewatch")
        assert policy["spec"]["policyTypes"] == ["Ingress"]
        sources = [rule["from"][0]["podSelector"]["matchLabels"]["app.kubernetes.io/name"]
                   for rule in policy["spec"]["ingress"]]
        assert sources == (["prometheus"] if name == "tracewatch-node" else ["prometheus", "otel-gateway"])


# -- the OpenTelemetry Collector configs: structure only ------------------------------------------------
def check_collector_config(cfg: dict) -> None:
    """What the Collector itself refuses at start: a pipeline naming a component not defined in
    its section (``type`` or ``type/name``), or a defined receiver or exporter no pipeline uses
    (common practice: the Collector warns of unused ones; here they count as mistakes)."""
    assert set(cfg) >= {"receivers", "exporters", "service"}
    used = {"receivers": set(), "processors": set(), "exporters": set()}
    for name, pipeline in cfg["service"]["pipelines"].items():
        assert name.split("/")[0] in ("traces", "logs", "metrics"), name
        assert pipeline["receivers"] and pipeline["exporters"], name
        for section in used:
            for component in pipeline.get(section, []):
                assert component in (cfg.get(section) or {}), f"{name}: {section} {component} is not defined"
                used[section].add(component)
    assert used["receivers"] == set(cfg["receivers"]) and used["exporters"] == set(cfg["exporters"])


def test_the_gateway_routes_each_trace_to_one_statefulset_pod():
    gateway = yaml.safe_load(GATEWAY.read_text())
    check_collector_config(gateway)
    lb = gateway["exporters"]["loadbalancing"]
    assert lb["routing_key"] == "traceID"
    assert "endpoint" not in lb["protocol"]["otlp"]  # the exporter sets it per backend
    sts = find("StatefulSet", "tracewatch-traces", "tracewatch")
    service = find("Service", sts["spec"]["serviceName"], "tracewatch")
    assert lb["resolver"]["dns"]["hostname"] == f"{service['metadata']['name']}.tracewatch.svc.cluster.local"
    (otlp_port,) = [p for p in service["spec"]["ports"] if p["name"] == "otlp-grpc"]
    assert lb["resolver"]["dns"]["port"] == otlp_port["port"]
    assert gateway["service"]["pipelines"]["traces"]["exporters"] == ["loadbalancing"]


def test_the_pods_collector_hands_spans_to_tracewatch_as_otlp_json(tmp_path):
    sts = find("StatefulSet", "tracewatch-traces", "tracewatch")
    spec = sts["spec"]["template"]["spec"]
    (collector,) = [c for c in spec["containers"] if c["name"] == "collector"]
    data = find("ConfigMap", "tracewatch-traces", "tracewatch")["data"]
    assert collector["args"] == ["--config=/etc/otelcol/collector.yaml"]
    pod_cfg = yaml.safe_load(data["collector.yaml"])
    check_collector_config(pod_cfg)
    grpc = pod_cfg["receivers"]["otlp"]["protocols"]["grpc"]["endpoint"]
    assert grpc == f"0.0.0.0:{collector['ports'][0]['containerPort']}" and collector["ports"][0]["name"] == "otlp-grpc"
    out = pod_cfg["exporters"]["file"]
    assert out["format"] == "json"  # one OTLP/JSON document per line
    local = tmp_path / "tracewatch.toml"
    local.write_text(data["tracewatch.toml"])
    (source,) = load_config(local).sources
    assert source.format == "otlp-json" and source.paths == [out["path"]]
    spans_mount = {c["name"]: {m["name"]: m for m in c["volumeMounts"]} for c in spec["containers"]}
    assert spans_mount["collector"]["spans"]["mountPath"] == spans_mount["tracewatch"]["spans"]["mountPath"] == "/spans"
    assert spans_mount["tracewatch"]["spans"]["readOnly"] and not spans_mount["collector"]["spans"].get("readOnly")
