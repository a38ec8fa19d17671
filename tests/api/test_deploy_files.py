"""The deploy files agree with the service: probe paths exist, variables are real settings."""

from __future__ import annotations

import re
from pathlib import Path

import yaml

from causeline.service.api.app import create_app
from causeline.service.api.settings import PREFIX, Settings

DEPLOY = Path(__file__).resolve().parents[2] / "deploy"


def _routes() -> set[str]:
    return {route.path for route in create_app(Settings()).routes}


def _known(name: str) -> bool:
    return name.startswith(PREFIX) and name[len(PREFIX):].lower() in Settings.model_fields


def test_kubernetes_probes_hit_health_routes_and_keys_come_from_a_secret() -> None:
    (deployment,) = yaml.safe_load_all((DEPLOY / "k8s" / "deployment.yaml").read_text("utf-8"))
    (service,) = yaml.safe_load_all((DEPLOY / "k8s" / "service.yaml").read_text("utf-8"))
    assert deployment["kind"] == "Deployment" and service["kind"] == "Service"
    (container,) = deployment["spec"]["template"]["spec"]["containers"]
    routes = _routes()
    assert container["livenessProbe"]["httpGet"]["path"] == "/v1/health/live"
    assert container["readinessProbe"]["httpGet"]["path"] == "/v1/health/ready"
    assert {"/v1/health/live", "/v1/health/ready"} <= routes
    env = {item["name"]: item for item in container["env"]}
    assert all(_known(name) for name in env), sorted(env)
    assert "secretKeyRef" in env["CAUSELINE_API_KEYS"]["valueFrom"]
    assert deployment["spec"]["template"]["spec"]["securityContext"]["runAsNonRoot"] is True
    selector = deployment["spec"]["selector"]["matchLabels"]
    assert service["spec"]["selector"] == selector


def test_compose_and_dockerfile() -> None:
    (compose,) = yaml.safe_load_all((DEPLOY / "compose.yaml").read_text("utf-8"))
    (service,) = compose["services"].values()
    assert all(_known(name) for name in service["environment"])
    assert "CAUSELINE_API_KEYS_FILE" in service["environment"]  # auth on in the deploy files
    dockerfile = (DEPLOY / "Dockerfile").read_text("utf-8")
    assert re.search(r"^FROM python:3\.11-slim$", dockerfile, re.M)
    user = re.findall(r"^USER (\S+)$", dockerfile, re.M)
    assert user and user[-1] not in {"root", "0"}
    assert "HEALTHCHECK" in dockerfile and "/v1/health/live" in dockerfile
    # The image installs the one package from the folders pyproject.toml maps into it, pinned.
    for folder in ("causeline", "service", "training"):
        assert re.search(rf"^COPY {folder} \./{folder}$", dockerfile, re.M), folder
    assert re.search(r"^RUN pip install -c constraints\.txt \.$", dockerfile, re.M)
    names = set(re.findall(r"\b(CAUSELINE_[A-Z_]+)=", dockerfile))
    assert names and all(_known(name) for name in names), names
