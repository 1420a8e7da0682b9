"""deploy/kubernetes/: every object against the Kubernetes API's own schemas
(kubernetes-validate, offline, strict: unknown fields refused), then what a
schema cannot see: selectors that select, names that resolve, probes on
befit's routes, a grace period that covers befit's drain, config files that
befit reads."""

from __future__ import annotations

import subprocess
import tomllib
from typing import Any, Dict, List

import kubernetes_validate
import pytest

from .cluster_env import REPO, config_text, find, manifests

# A cluster a few releases behind, and the newest release the validator's
# schema set knows (kubernetes-validate 1.37.0 ships 1.25 to 1.37).
VERSIONS = ["1.29.0", "1.37.0"]

PRE_STOP_SLEEP = 5  # seconds, the preStop hook of every pod (checked below)


def pods(kind: str) -> List[Dict[str, Any]]:
    return [d for d in manifests() if d["kind"] == kind]


def workloads() -> List[Dict[str, Any]]:
    return pods("Deployment") + pods("StatefulSet")


def selects(selector: Dict[str, str], labels: Dict[str, str]) -> bool:
    return all(labels.get(k) == v for k, v in selector.items())


@pytest.mark.parametrize("version", VERSIONS)
def test_every_object_validates_against_the_api_schemas(version):
    docs = manifests()
    assert {d["kind"] for d in docs} >= {
        "ConfigMap",
        "Deployment",
        "Service",
        "PodDisruptionBudget",
        "HorizontalPodAutoscaler",
        "StatefulSet",
        "Ingress",
    }
    for doc in docs:
        body = {k: v for k, v in doc.items() if k != "__file__"}
        kubernetes_validate.validate(body, version, strict=True)


def test_the_validator_refuses_an_unknown_field():
    # The check above can fail: a misspelt field is caught.
    body = {k: v for k, v in find("Deployment", "befit-reward").items() if k != "__file__"}
    body = dict(body, spec=dict(body["spec"], replica=3))
    with pytest.raises(kubernetes_validate.ValidationError):
        kubernetes_validate.validate(body, VERSIONS[-1], strict=True)


def test_selectors_select_and_names_resolve():
    services = {d["metadata"]["name"]: d for d in pods("Service")}
    templates = {d["metadata"]["name"]: d["spec"]["template"]["metadata"]["labels"] for d in workloads()}
    for w in workloads():
        assert selects(w["spec"]["selector"]["matchLabels"], templates[w["metadata"]["name"]])
    for name, svc in services.items():
        chosen = [w for w, labels in templates.items() if selects(svc["spec"]["selector"], labels)]
        assert len(chosen) == 1, f"Service {name} selects {chosen}"
    assert find("StatefulSet", "befit-bank")["spec"]["serviceName"] in services
    assert services[find("StatefulSet", "befit-bank")["spec"]["serviceName"]]["spec"]["clusterIP"] == "None"
    for rule in find("Ingress", "befit")["spec"]["rules"]:
        for p in rule["http"]["paths"]:
            svc = services[p["backend"]["service"]["name"]]
            assert p["backend"]["service"]["port"]["name"] in {q["name"] for q in svc["spec"]["ports"]}
    pdb = find("PodDisruptionBudget", "befit-reward")
    assert selects(pdb["spec"]["selector"]["matchLabels"], templates["befit-reward"])
    hpa = find("HorizontalPodAutoscaler", "befit-reward")
    assert hpa["spec"]["scaleTargetRef"]["name"] == "befit-reward"
    # The budget never blocks every eviction, and the autoscaler's floor keeps it satisfiable.
    assert pdb["spec"]["minAvailable"] < hpa["spec"]["minReplicas"]
    assert find("Deployment", "befit-reward")["spec"]["replicas"] >= hpa["spec"]["minReplicas"]
    # One writer of the bank.
    assert find("StatefulSet", "befit-bank")["spec"]["replicas"] == 1


def test_bank_and_statistics_routes_go_to_the_bank_and_the_rest_to_reward_replicas():
    routes = {}
    for rule in find("Ingress", "befit")["spec"]["rules"]:
        for p in rule["http"]["paths"]:
            routes[p["path"]] = p["backend"]["service"]["name"]
    assert routes == {
        "/v1/bank": "befit-bank",
        "/v1/neighbors": "befit-bank",
        "/v1/calibration": "befit-bank",
        "/v1/drift": "befit-bank",
        "/": "befit-reward",
    }


def container(workload: Dict[str, Any]) -> Dict[str, Any]:
    (c,) = workload["spec"]["template"]["spec"]["containers"]
    return c


@pytest.mark.parametrize("name", ["befit-reward", "befit-bank"])
def test_probes_grace_and_config_match_befit(name):
    w = find("Deployment", name) if name == "befit-reward" else find("StatefulSet", name)
    c = container(w)
    assert c["readinessProbe"]["httpGet"]["path"] == "/readyz"
    assert c["livenessProbe"]["httpGet"]["path"] == "/healthz"
    assert c["lifecycle"]["preStop"]["exec"]["command"] == ["sleep", str(PRE_STOP_SLEEP)]
    env = {e["name"]: e["value"] for e in c["env"]}
    mount = next(m for m in c["volumeMounts"] if m["name"] == "config")["mountPath"]
    assert env["BEFIT_CONFIG"].startswith(mount + "/")
    key = env["BEFIT_CONFIG"].rsplit("/", 1)[1]
    config = tomllib.loads(config_text(key))
    # befit drains for at most one request timeout after SIGTERM; the pod
    # must be given the preStop sleep plus that before it is killed.
    grace = w["spec"]["template"]["spec"]["terminationGracePeriodSeconds"]
    assert grace >= PRE_STOP_SLEEP + config["request-timeout-secs"] + 10
    assert config["data-dir"] == next(m for m in c["volumeMounts"] if m["name"] == "data")["mountPath"]
    port = c["ports"][0]["containerPort"]
    assert config["listen"] == f"0.0.0.0:{port}"
    assert w["spec"]["template"]["spec"]["securityContext"]["runAsUser"] == 10001  # docker/Dockerfile's user


@pytest.mark.parametrize("key", ["reward.toml", "bank.toml"])
def test_the_configmaps_files_are_read_by_befit(key, tmp_path):
    # befit itself reads the file: every key known, every value parsed. The
    # image's paths do not exist here, so the bundle is given by flag and
    # the check stops at the bundle's loading, past the config.
    path = tmp_path / key
    path.write_text(config_text(key))
    binary = REPO / "target/release/befit"
    done = subprocess.run(
        [str(binary), "serve", "--config", str(path), "--listen", "127.0.0.1:0", "--data-dir", str(tmp_path / "d"),
         "--ort-lib", "/nonexistent/libonnxruntime.so"],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert done.returncode != 0
    assert "config file" not in done.stderr, done.stderr
    assert "onnxruntime" in done.stderr.lower(), done.stderr
