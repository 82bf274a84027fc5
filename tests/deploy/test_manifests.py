"""The deployment files parse, and what they point at exists."""

import runpy
from pathlib import Path

import pytest
import yaml

from service.serving import GUNICORN_CONF

DEPLOY = Path(__file__).resolve().parents[2] / "deploy"


def _documents():
    docs = []
    for path in sorted((DEPLOY / "k8s").glob("*.yaml")):
        docs.extend((path.name, doc) for doc in yaml.safe_load_all(path.read_text()) if doc)
    return docs


def _by_kind(kind):
    found = [doc for _, doc in _documents() if doc["kind"] == kind]
    assert found, f"no {kind} manifest"
    return found[0]


def _container():
    return _by_kind("Deployment")["spec"]["template"]["spec"]["containers"][0]


class TestManifests:
    def test_every_manifest_parses_with_kind_and_name(self):
        kinds = {doc["kind"] for _, doc in _documents()}
        assert {"Deployment", "Service", "HorizontalPodAutoscaler",
                "PodDisruptionBudget"} <= kinds
        for name, doc in _documents():
            assert doc["apiVersion"] and doc["metadata"]["name"], name

    @pytest.mark.parametrize("probe", ("startupProbe", "readinessProbe", "livenessProbe"))
    def test_probes_point_at_real_routes(self, app, probe):
        container = _container()
        path = container[probe]["httpGet"]["path"]
        routes = {rule.rule for rule in app.url_map.iter_rules()}
        assert path in routes
        port = container[probe]["httpGet"]["port"]
        assert port in {p["name"] for p in container["ports"]}
        assert app.test_client().get(path).status_code == 200

    def test_resources_and_hardening(self):
        container = _container()
        for key in ("requests", "limits"):
            assert {"cpu", "memory"} <= set(container["resources"][key])
        assert container["securityContext"]["readOnlyRootFilesystem"] is True
        pod = _by_kind("Deployment")["spec"]["template"]["spec"]
        assert pod["securityContext"]["runAsNonRoot"] is True
        # The only writable place is /tmp, where the metrics files live.
        mounts = {m["mountPath"] for m in container["volumeMounts"]}
        assert mounts == {"/tmp"}

    def test_selectors_match_the_pods(self):
        labels = _by_kind("Deployment")["spec"]["template"]["metadata"]["labels"]
        assert _by_kind("Service")["spec"]["selector"].items() <= labels.items()
        assert _by_kind("PodDisruptionBudget")["spec"]["selector"]["matchLabels"].items() \
            <= labels.items()
        target = _by_kind("HorizontalPodAutoscaler")["spec"]["scaleTargetRef"]
        assert target["kind"] == "Deployment"
        assert target["name"] == _by_kind("Deployment")["metadata"]["name"]

    def test_pdb_leaves_room_for_the_autoscaler_minimum(self):
        hpa = _by_kind("HorizontalPodAutoscaler")["spec"]
        pdb = _by_kind("PodDisruptionBudget")["spec"]
        assert pdb["minAvailable"] < hpa["minReplicas"]

    def test_grace_period_outlasts_gunicorn_drain(self, monkeypatch, tmp_path):
        # The config prepares the metrics folder it is given; keep that out of this process.
        monkeypatch.setenv("PROMETHEUS_MULTIPROC_DIR", str(tmp_path / "metrics"))
        conf = runpy.run_path(str(GUNICORN_CONF))
        pod = _by_kind("Deployment")["spec"]["template"]["spec"]
        assert pod["terminationGracePeriodSeconds"] > conf["graceful_timeout"]
        assert conf["preload_app"] is True
        assert conf["workers"] >= 2


    def test_trusts_no_forwarded_headers_and_no_shared_control_socket(self, monkeypatch,
                                                                      tmp_path):
        from gunicorn.config import Config

        monkeypatch.delenv("FORWARDED_ALLOW_IPS", raising=False)
        monkeypatch.setenv("PROMETHEUS_MULTIPROC_DIR", str(tmp_path / "metrics"))
        conf = runpy.run_path(str(GUNICORN_CONF))
        cfg = Config()
        cfg.set("forwarded_allow_ips", conf["forwarded_allow_ips"])
        assert cfg.forwarded_allow_ips == []
        assert conf["control_socket_disable"] is True


class TestContainerfile:
    def test_runs_as_non_root_with_tables_in_the_image(self):
        text = (DEPLOY / "Containerfile").read_text()
        users = [line.split()[1] for line in text.splitlines() if line.startswith("USER ")]
        assert users and users[-1] not in {"root", "0"}
        assert "check-tables" in text
        # tables/ is copied before the package that links to it is built.
        assert text.index("COPY tables") < text.index("COPY service") < text.index("pip install")
        assert 'CMD ["annuity-service", "serve"]' in text
