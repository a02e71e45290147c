"""deploy/k8s and deploy/compose.yaml: valid against the Kubernetes schemas, lint-clean YAML,
and the properties the deployment relies on.

Outside references: the Kubernetes OpenAPI schemas as packaged by kubernetes-validate
(strict mode rejects unknown fields), and yamllint.
"""

import copy
import pathlib
import re
import runpy
import subprocess
import sys

import kubernetes_validate
import pytest
import yaml

ROOT = pathlib.Path(__file__).resolve().parents[2]
K8S = ROOT / "deploy" / "k8s"
#: Oldest Kubernetes release the manifests target (preStop sleep action: 1.29+).
K8S_VERSION = "1.30.0"


def resources():
    out = {}
    for path in sorted(K8S.glob("*.yaml")):
        for doc in yaml.safe_load_all(path.read_text()):
            if doc and doc.get("kind") != "Kustomization":
                out[doc["kind"]] = doc
    return out


@pytest.mark.parametrize("version", [K8S_VERSION, kubernetes_validate.latest_version()])
def test_every_manifest_valid_against_kubernetes_schemas(version):
    docs = resources()
    assert set(docs) == {
        "ConfigMap",
        "Deployment",
        "Service",
        "HorizontalPodAutoscaler",
        "PodDisruptionBudget",
    }
    for doc in docs.values():
        kubernetes_validate.validate(doc, version, strict=True)


def test_schema_validation_can_fail():
    bad = copy.deepcopy(resources()["Deployment"])
    sc = bad["spec"]["template"]["spec"]["containers"][0]["securityContext"]
    sc["readOnlyRootFileSystem"] = sc.pop("readOnlyRootFilesystem")  # a typo
    with pytest.raises(kubernetes_validate.ValidationError):
        kubernetes_validate.validate(bad, K8S_VERSION, strict=True)


def test_kustomization_lists_every_manifest():
    kust = yaml.safe_load((K8S / "kustomization.yaml").read_text())
    files = {p.name for p in K8S.glob("*.yaml")} - {"kustomization.yaml"}
    assert set(kust["resources"]) == files


def test_yamllint_clean():
    paths = [str(p) for p in K8S.glob("*.yaml")] + [
        str(ROOT / "deploy" / "compose.yaml"),
        str(ROOT / "deploy" / "k8s-bulk-pool" / "kustomization.yaml"),
    ]
    r = subprocess.run(
        [sys.executable, "-m", "yamllint", "-s", "-c", str(ROOT / "deploy" / "yamllint.yaml")]
        + paths,
        capture_output=True,
        text=True,
    )
    assert r.returncode == 0, r.stdout + r.stderr


def container():
    return resources()["Deployment"]["spec"]["template"]["spec"]["containers"][0]


def test_probes_on_the_service_endpoints():
    c = container()
    assert c["livenessProbe"]["httpGet"]["path"] == "/health"
    assert c["readinessProbe"]["httpGet"]["path"] == "/ready"
    from service.api import create_app
    from service.config import Settings

    app = create_app({"SKYDRIFT_SETTINGS": Settings()})
    rules = {r.rule for r in app.url_map.iter_rules()}
    assert {"/health", "/ready", "/metrics"} <= rules


def test_liveness_outlasts_the_worker_timeout():
    """A pod busy with batches answers /health late (it waits for a worker thread); the
    kubelet must not kill it for that before gunicorn's own worker timeout would have
    acted on a stuck worker, or queued batches are lost with it."""
    probe = container()["livenessProbe"]
    window = probe["periodSeconds"] * (probe["failureThreshold"] - 1) + probe["timeoutSeconds"]
    timeout_s = int(resources()["ConfigMap"]["data"]["SKYDRIFT_TIMEOUT_S"])
    assert window > timeout_s


def test_resources_and_security_context():
    c = container()
    assert {"cpu", "memory"} <= set(c["resources"]["requests"])
    assert {"cpu", "memory"} <= set(c["resources"]["limits"])
    sc = c["securityContext"]
    assert sc["runAsNonRoot"] is True and sc["runAsUser"] != 0
    assert sc["readOnlyRootFilesystem"] is True
    assert sc["allowPrivilegeEscalation"] is False
    assert sc["capabilities"]["drop"] == ["ALL"]
    pod = resources()["Deployment"]["spec"]["template"]["spec"]
    tmp = next(m for m in c["volumeMounts"] if m["mountPath"] == "/tmp")
    volume = next(v for v in pod["volumes"] if v["name"] == tmp["name"])
    assert "emptyDir" in volume
    # The image's user is the one the manifests run as.
    dockerfile = (ROOT / "deploy" / "Dockerfile").read_text()
    assert f"USER {sc['runAsUser']}:" in dockerfile


def test_grace_period_covers_gunicorn_graceful_timeout(monkeypatch, tmp_path):
    monkeypatch.setenv("PROMETHEUS_MULTIPROC_DIR", str(tmp_path))
    conf = runpy.run_path(str(ROOT / "deploy" / "gunicorn.conf.py"))
    pod = resources()["Deployment"]["spec"]["template"]["spec"]
    pre_stop = container()["lifecycle"]["preStop"]["sleep"]["seconds"]
    assert pod["terminationGracePeriodSeconds"] > conf["graceful_timeout"] + pre_stop
    compose = yaml.safe_load((ROOT / "deploy" / "compose.yaml").read_text())
    grace = compose["services"]["skydrift"]["stop_grace_period"]
    assert int(re.fullmatch(r"(\d+)s", grace).group(1)) > conf["graceful_timeout"]


def test_selectors_match_the_pods():
    docs = resources()
    labels = docs["Deployment"]["spec"]["template"]["metadata"]["labels"]
    for kind in ("Service", "PodDisruptionBudget"):
        spec = docs[kind]["spec"]
        selector = spec["selector"].get("matchLabels", spec["selector"])
        assert selector.items() <= labels.items(), kind
    target = docs["HorizontalPodAutoscaler"]["spec"]["scaleTargetRef"]
    assert (target["kind"], target["name"]) == (
        "Deployment",
        docs["Deployment"]["metadata"]["name"],
    )
    env_from = container()["envFrom"][0]["configMapRef"]["name"]
    assert env_from == docs["ConfigMap"]["metadata"]["name"]


def test_configmap_settings_are_valid_settings():
    from service.config import Settings

    data = resources()["ConfigMap"]["data"]
    assert all(k.startswith("SKYDRIFT_") for k in data)
    Settings.from_env(data)  # raises ConfigError naming the variable if not


def test_compose_runs_like_the_cluster():
    svc = yaml.safe_load((ROOT / "deploy" / "compose.yaml").read_text())["services"]["skydrift"]
    assert svc["build"]["dockerfile"] == "deploy/Dockerfile"
    assert svc["read_only"] is True
    assert any(t.startswith("/tmp") for t in svc["tmpfs"])
    assert svc["cap_drop"] == ["ALL"]
    assert "no-new-privileges:true" in svc["security_opt"]
    assert not svc["user"].startswith("0")


def test_compose_bulk_pool_is_optional_and_as_hardened():
    services = yaml.safe_load((ROOT / "deploy" / "compose.yaml").read_text())["services"]
    main, bulk = services["skydrift"], services["skydrift-bulk"]
    assert "profiles" not in main and bulk["profiles"] == ["bulk-pool"]
    assert bulk["image"] == main["image"]
    assert bulk["environment"]["SKYDRIFT_WORKER_NICE"] == "10"
    for key in ("read_only", "cap_drop", "security_opt", "user", "stop_grace_period"):
        assert bulk[key] == main[key], key


def test_bulk_pool_overlay_renders_valid_and_apart_from_the_service():
    import shutil

    if shutil.which("kubectl") is None:
        pytest.skip("kubectl (which renders kustomizations) is not installed")
    out = subprocess.run(
        ["kubectl", "kustomize", str(ROOT / "deploy" / "k8s-bulk-pool")],
        capture_output=True,
        text=True,
        check=True,
    ).stdout
    bulk = {d["kind"]: d for d in yaml.safe_load_all(out) if d}
    base = resources()
    assert set(bulk) == set(base)
    for doc in bulk.values():
        kubernetes_validate.validate(doc, K8S_VERSION, strict=True)
        assert doc["metadata"]["name"] == "skydrift-bulk"
    # The pointing clients' Service must never select a bulk pod, and the other way round.
    pod_labels = bulk["Deployment"]["spec"]["template"]["metadata"]["labels"]
    base_selector = base["Service"]["spec"]["selector"]
    assert not all(pod_labels.get(k) == v for k, v in base_selector.items())
    assert bulk["Service"]["spec"]["selector"].items() <= pod_labels.items()
    spec = bulk["Deployment"]["spec"]["template"]["spec"]
    env = {e["name"]: e.get("value") for e in spec["containers"][0]["env"]}
    assert env["SKYDRIFT_WORKER_NICE"] == "10"
    assert spec["containers"][0]["envFrom"][0]["configMapRef"]["name"] == "skydrift-bulk"
    assert bulk["HorizontalPodAutoscaler"]["spec"]["scaleTargetRef"]["name"] == "skydrift-bulk"


def test_bulk_pool_keeps_its_batch_limit_when_the_interactive_pool_lowers_it(tmp_path):
    import shutil

    if shutil.which("kubectl") is None:
        pytest.skip("kubectl (which renders kustomizations) is not installed")
    # What the overlay and the README advise for the interactive pool: SKYDRIFT_MAX_STARS
    # "1000" in deploy/k8s/configmap.yaml. The bulk overlay copies that ConfigMap, so the
    # bulk pool refused every batch over 1,000 stars too.
    shutil.copytree(K8S, tmp_path / "k8s")
    shutil.copytree(ROOT / "deploy" / "k8s-bulk-pool", tmp_path / "k8s-bulk-pool")
    configmap = tmp_path / "k8s" / "configmap.yaml"
    configmap.write_text(
        configmap.read_text().replace('SKYDRIFT_MAX_STARS: "1000000"', 'SKYDRIFT_MAX_STARS: "1000"')
    )

    def rendered(folder):
        out = subprocess.run(
            ["kubectl", "kustomize", str(tmp_path / folder)],
            capture_output=True,
            text=True,
            check=True,
        ).stdout
        return next(d for d in yaml.safe_load_all(out) if d and d["kind"] == "ConfigMap")

    assert rendered("k8s")["data"]["SKYDRIFT_MAX_STARS"] == "1000"
    # The default limit (service/config.py, Settings.max_stars).
    assert rendered("k8s-bulk-pool")["data"]["SKYDRIFT_MAX_STARS"] == "1000000"
