"""The deployment files parse, agree with each other, and what they point at exists.

These are parse tests: no container engine is available to build the images, so the
Containerfiles are read, not built; the proxy's rendered configuration is parsed here, checked
by `nginx -t` when nginx is installed, and measured live by `make faults`.
"""

import importlib.util
import runpy
import shutil
import subprocess
from pathlib import Path

import pytest
import yaml

from service.serving import GUNICORN_CONF
from tests.deploy import nginxconf

ROOT = Path(__file__).resolve().parents[2]
DEPLOY = ROOT / "deploy"


def _render_module():
    spec = importlib.util.spec_from_file_location("annuity_nginx_render",
                                                  DEPLOY / "nginx" / "render.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


render = _render_module()


def _documents():
    docs = []
    for path in sorted((DEPLOY / "k8s").glob("*.yaml")):
        docs.extend((path.name, doc) for doc in yaml.safe_load_all(path.read_text()) if doc)
    return docs


def _by_kind(kind):
    found = [doc for _, doc in _documents() if doc["kind"] == kind]
    assert found, f"no {kind} manifest"
    return found[0]


def _pod():
    return _by_kind("Deployment")["spec"]["template"]["spec"]


def _container(name):
    (found,) = [c for c in _pod()["containers"] if c["name"] == name]
    return found


def _env(container) -> dict:
    return {e["name"]: e.get("value") for e in container.get("env", [])}


def _gunicorn(monkeypatch, tmp_path, env=None) -> dict:
    # The config prepares the metrics folder it is given; keep that out of this process.
    monkeypatch.setenv("PROMETHEUS_MULTIPROC_DIR", str(tmp_path / "metrics"))
    for name, value in (env or {}).items():
        monkeypatch.setenv(name, value)
    return runpy.run_path(str(GUNICORN_CONF))


def _container_config() -> nginxconf.Directive:
    return nginxconf.parse(render.render(render.values_for("container")))


def _servers(conf):
    return conf.one("http").find("server")


def _listen_port(server) -> int:
    return int(server.one("listen").args[0].rsplit(":", 1)[1])


def _server_on(conf, port: int):
    (found,) = [s for s in _servers(conf) if _listen_port(s) == port]
    return found


def _location(server, *args):
    (found,) = [loc for loc in server.find("location") if loc.args == list(args)]
    return found


def _port_number(container, port) -> int:
    """A probe's port: a name of one of this container's ports, or a number."""
    if isinstance(port, int):
        return port
    (number,) = [p["containerPort"] for p in container["ports"] if p["name"] == port]
    return number


def _pod_ports() -> dict[int, str]:
    return {p["containerPort"]: c["name"] for c in _pod()["containers"]
            for p in c.get("ports", [])}


class TestManifests:
    def test_every_manifest_parses_with_kind_and_name(self):
        kinds = {doc["kind"] for _, doc in _documents()}
        assert {"Deployment", "Service", "HorizontalPodAutoscaler",
                "PodDisruptionBudget"} <= kinds
        for name, doc in _documents():
            assert doc["apiVersion"] and doc["metadata"]["name"], name

    def test_the_proxy_is_a_sidecar_and_the_only_way_in(self):
        names = [c["name"] for c in _pod()["containers"]]
        assert sorted(names) == ["proxy", "service"]
        # Gunicorn binds loopback only and declares no port; the proxy forwards to it.
        env = _env(_container("service"))
        assert env["HOST"] == "127.0.0.1"
        assert "ports" not in _container("service")
        conf = _container_config()
        upstream = conf.one("http").one("upstream").one("server").args[0]
        assert upstream == f"{env['HOST']}:{env['PORT']}"
        # Clients reach the proxy's port: the Service targets it, metrics are scraped on it.
        target = _by_kind("Service")["spec"]["ports"][0]["targetPort"]
        client_port = _port_number(_container("proxy"), target)
        assert _pod_ports()[client_port] == "proxy"
        assert _location(_server_on(conf, client_port), "/").one("proxy_pass")
        annotations = _by_kind("Deployment")["spec"]["template"]["metadata"]["annotations"]
        assert int(annotations["prometheus.io/port"]) == client_port

    @pytest.mark.parametrize("name,probe", [
        ("service", "startupProbe"), ("service", "readinessProbe"),
        ("service", "livenessProbe"), ("proxy", "readinessProbe"),
        ("proxy", "livenessProbe")])
    def test_probes_point_at_real_routes(self, app, name, probe):
        container = _container(name)
        spec = container[probe]["httpGet"]
        assert container[probe]["timeoutSeconds"] == 1
        port = _port_number(container, spec["port"])
        assert port in _pod_ports(), "a probe must reach a port some container declares"
        server = _server_on(_container_config(), port)
        locations = {tuple(loc.args) for loc in server.find("location")}
        if ("/",) in locations and _location(server, "/").find("proxy_pass"):
            # Through the proxy to the service: the route must exist and answer 200.
            routes = {rule.rule for rule in app.url_map.iter_rules()}
            assert spec["path"] in routes
            assert app.test_client().get(spec["path"]).status_code == 200
        else:
            # Answered by nginx itself.
            assert ("=", spec["path"]) in locations
            assert _location(server, "=", spec["path"]).one("return").args[0] == "200"

    def test_service_liveness_tolerates_more_failures_than_the_proxys(self):
        # Both go through the proxy; a stuck proxy must be restarted first.
        service = _container("service")["livenessProbe"]
        proxy = _container("proxy")["livenessProbe"]
        assert service["failureThreshold"] * service["periodSeconds"] > \
            proxy["failureThreshold"] * proxy["periodSeconds"]

    def test_resources_and_hardening(self):
        for container in _pod()["containers"]:
            for key in ("requests", "limits"):
                assert {"cpu", "memory"} <= set(container["resources"][key]), container["name"]
            assert container["securityContext"]["readOnlyRootFilesystem"] is True
            assert container["securityContext"]["allowPrivilegeEscalation"] is False
            # The only writable place is /tmp: metrics files, or nginx's temporary files.
            mounts = {m["mountPath"] for m in container["volumeMounts"]}
            assert mounts == {"/tmp"}, container["name"]
        assert _pod()["securityContext"]["runAsNonRoot"] is True
        # Each container has its own /tmp: buffered bodies never fill the metrics volume.
        volumes = [m["name"] for c in _pod()["containers"] for m in c["volumeMounts"]]
        assert len(set(volumes)) == len(volumes)

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

    def test_grace_period_outlasts_every_drain(self, monkeypatch, tmp_path):
        conf = _gunicorn(monkeypatch, tmp_path)
        grace = _pod()["terminationGracePeriodSeconds"]
        service_pause = _container("service")["lifecycle"]["preStop"]["sleep"]["seconds"]
        proxy_pause = _container("proxy")["lifecycle"]["preStop"]["sleep"]["seconds"]
        nginx_drain = nginxconf.seconds(_container_config().one("worker_shutdown_timeout")
                                        .args[0])
        assert grace > service_pause + conf["graceful_timeout"]
        assert grace > proxy_pause + nginx_drain
        # Gunicorn still accepts while the proxy stops taking new connections.
        assert service_pause > proxy_pause
        assert conf["preload_app"] is True
        assert conf["workers"] >= 2


class TestGunicornConfig:
    def test_threads_leave_room_for_probes(self, monkeypatch, tmp_path):
        deployed = _env(_container("service"))
        conf = _gunicorn(monkeypatch, tmp_path, {"WEB_THREADS": deployed["WEB_THREADS"]})
        assert conf["worker_class"] == "gthread"
        slots = int(deployed["ANNUITY_VALUATIONS_PER_WORKER"])
        # Valuations cannot take every thread of a worker.
        assert 0 < slots < conf["threads"]
        # A worker never queues connections behind busy threads.
        assert conf["worker_connections"] == conf["threads"]
        assert conf["keepalive"] == 0

    def test_trusts_no_forwarded_headers_and_no_shared_control_socket(self, monkeypatch,
                                                                      tmp_path):
        from gunicorn.config import Config

        monkeypatch.delenv("FORWARDED_ALLOW_IPS", raising=False)
        conf = _gunicorn(monkeypatch, tmp_path)
        cfg = Config()
        cfg.set("forwarded_allow_ips", conf["forwarded_allow_ips"])
        assert cfg.forwarded_allow_ips == []
        assert conf["control_socket_disable"] is True

    def test_header_limit_matches_the_proxy(self, monkeypatch, tmp_path):
        conf = _gunicorn(monkeypatch, tmp_path)
        count, buffer = _container_config().one("http").one("large_client_header_buffers").args
        assert nginxconf.size(buffer) >= conf["limit_request_field_size"]


class TestProxyConfig:
    """The rendered configuration holds the figures of README 'Deploying'."""

    def test_reads_requests_whole_with_timeouts_and_limits(self, app):
        http = _container_config().one("http")
        assert nginxconf.seconds(http.one("client_header_timeout").args[0]) <= 10
        assert nginxconf.seconds(http.one("client_body_timeout").args[0]) <= 10
        assert nginxconf.seconds(http.one("send_timeout").args[0]) <= 10
        assert http.one("reset_timedout_connection").args == ["on"]
        # The service's own body limit, enforced before any upload reaches gunicorn.
        assert nginxconf.size(http.one("client_max_body_size").args[0]) == \
            app.config["MAX_CONTENT_LENGTH"]
        zone = http.one("limit_conn_zone")
        assert zone.args[0] == "$binary_remote_addr"
        name, limit = http.one("limit_conn").args
        assert zone.args[1].startswith(f"zone={name}:") and 0 < int(limit) <= 256
        location = _location(_server_on(_container_config(), 8000), "/")
        assert location.one("proxy_request_buffering").args == ["on"]
        assert location.one("proxy_buffering").args == ["on"]
        assert location.one("proxy_next_upstream").args == ["off"]
        for header in ("X-Forwarded-For", "X-Forwarded-Proto", "Forwarded"):
            assert [header, ""] in [d.args for d in location.find("proxy_set_header")]

    def test_runs_in_the_foreground_writing_only_under_its_runtime_dir(self):
        values = render.values_for("container")
        conf = _container_config()
        assert conf.one("daemon").args == ["off"]
        paths = [conf.one("pid").args[0]] + [
            d.args[0] for d in conf.walk() if d.name.endswith("_temp_path")]
        assert len(paths) == 6
        assert all(p.startswith(values["runtime_dir"] + "/") for p in paths)
        # The probes' port and the clients' port are the ones the Deployment declares.
        ports = {_listen_port(s) for s in _servers(conf)}
        assert ports == {p["containerPort"] for p in _container("proxy")["ports"]}

    def test_render_refuses_missing_and_unknown_values(self):
        values = render.values_for("container")
        with pytest.raises(ValueError, match="missing"):
            render.render({k: v for k, v in values.items() if k != "listen"})
        with pytest.raises(ValueError, match="unknown"):
            render.render(values | {"surprise": "1"})
        with pytest.raises(ValueError, match="plain word"):
            render.render(values | {"listen": "8000; include /etc/passwd"})

    @pytest.mark.skipif(not (shutil.which("nginx") or Path("/usr/sbin/nginx").exists()),
                        reason="nginx is not installed (make faults installs it)")
    def test_nginx_accepts_the_rendered_configuration(self, tmp_path):
        nginx = shutil.which("nginx") or "/usr/sbin/nginx"
        text = render.render(render.values_for(
            "container", runtime_dir=str(tmp_path), error_log=str(tmp_path / "error.log"),
            access_log=str(tmp_path / "access.log")))
        (tmp_path / "nginx.conf").write_text(text)
        done = subprocess.run([nginx, "-t", "-c", str(tmp_path / "nginx.conf"),
                               "-e", str(tmp_path / "error.log")],
                              capture_output=True, text=True, check=False)
        assert done.returncode == 0, done.stderr


class TestContainerfiles:
    def _lines(self, path):
        return [line for line in path.read_text().splitlines()
                if line and not line.startswith("#")]

    def test_service_image_runs_as_non_root_on_loopback_with_tables(self):
        path = DEPLOY / "Containerfile"
        text = path.read_text()
        users = [line.split()[1] for line in self._lines(path) if line.startswith("USER ")]
        assert users and users[-1] not in {"root", "0"}
        assert "check-tables" in text
        # tables/ is copied before the package that links to it is built.
        assert text.index("COPY tables") < text.index("COPY service") < text.index("pip install")
        assert "HOST=127.0.0.1" in text and "PORT=8001" in text
        assert 'CMD ["annuity-service", "serve"]' in text

    def test_proxy_image_renders_the_one_template_and_stops_gracefully(self):
        path = DEPLOY / "nginx" / "Containerfile"
        lines = self._lines(path)
        text = "\n".join(lines)
        assert "render.py --profile container" in text
        assert "nginx.conf.template" in text
        assert "apt-get install -y --no-install-recommends nginx" in text
        users = [line.split()[1] for line in lines if line.startswith("USER ")]
        assert users and users[-1] not in {"root", "0"}
        assert "STOPSIGNAL SIGQUIT" in lines
        assert any(line.startswith("RUN nginx -t") for line in lines)
