"""deploy/nginx/kridge.conf in front of a real kridge: a real nginx (Debian's nginx-light)
buffers slow clients, passes answers through unchanged and refuses what kridge would refuse
in kridge's error shape. Skipped without nginx, except in CI (.ci/run installs it)."""

from __future__ import annotations

import json
import os
import re
import shutil
import socket
import subprocess
import time
from pathlib import Path

import pytest
import requests
from make_coating_data import TYPICAL_ROW
from service_helpers import ROOT, Gunicorn, free_port, small_model_store, wait_for

NGINX = shutil.which("nginx") or "/usr/sbin/nginx"

if not os.access(NGINX, os.X_OK):
    if os.environ.get("CI"):
        pytest.fail("nginx is missing in CI: .ci/run installs nginx-light", pytrace=False)
    pytest.skip("nginx is not installed (Debian: nginx-light)", allow_module_level=True)


def site_config(listen: int, upstream: str) -> str:
    """The shipped site file with this test's ports (the only lines changed)."""
    text = (ROOT / "deploy" / "nginx" / "kridge.conf").read_text()
    text, n = re.subn(r"server 127\.0\.0\.1:8000;", f"server {upstream};", text)
    assert n == 1
    text, n = re.subn(r"listen 80;", f"listen 127.0.0.1:{listen};", text)
    assert n == 1
    return text


class Nginx:
    """nginx in the foreground with everything under ``root``, ended by its pid."""

    def __init__(self, root: Path, listen: int, upstream: str):
        self.root, self.port = root, listen
        (root / "conf.d").mkdir(parents=True)
        (root / "conf.d" / "kridge.conf").write_text(site_config(listen, upstream))
        user = "user root;\n" if os.geteuid() == 0 else ""  # its temp files stay ours
        (root / "nginx.conf").write_text(
            f"{user}worker_processes 1;\npid {root}/nginx.pid;\nerror_log {root}/error.log;\n"
            "events { worker_connections 256; }\n"
            f"http {{ access_log off; client_body_temp_path {root}/body; "
            f"proxy_temp_path {root}/proxy; fastcgi_temp_path {root}/f; "
            f"uwsgi_temp_path {root}/u; scgi_temp_path {root}/s; "
            f"include {root}/conf.d/*.conf; }}\n")
        self.proc: subprocess.Popen | None = None

    def __enter__(self) -> Nginx:
        conf = str(self.root / "nginx.conf")
        check = subprocess.run([NGINX, "-t", "-p", str(self.root), "-c", conf],
                               capture_output=True, text=True)
        assert check.returncode == 0, check.stderr
        self.proc = subprocess.Popen([NGINX, "-p", str(self.root), "-c", conf, "-g",
                                      "daemon off;"], stderr=subprocess.DEVNULL)
        try:
            wait_for(lambda: self._answers(), 30, "nginx to listen")
        except BaseException:  # no __exit__ after a failed __enter__: end it here
            self.__exit__(None, None, None)
            raise
        return self

    def _answers(self) -> bool:
        """nginx answers anything (kridge behind it may be down on purpose)."""
        try:
            requests.get(self.base + "/healthz", timeout=2)
        except requests.RequestException:
            return False
        return True

    @property
    def base(self) -> str:
        return f"http://127.0.0.1:{self.port}"

    def __exit__(self, *exc) -> None:
        self.proc.terminate()
        self.proc.wait(timeout=30)


@pytest.fixture(scope="module")
def store(tmp_path_factory, demo_csv):
    return small_model_store(tmp_path_factory.mktemp("nginx"), demo_csv)


def test_nginx_buffers_slow_clients_and_keeps_the_error_shape(store, tmp_path):
    log = tmp_path / "access.jsonl"
    with Gunicorn(store, workers=2, env={"KRIDGE_ACCESS_LOG": str(log)}) as g, \
            Nginx(tmp_path / "nginx", free_port(), g.bind) as proxy:
        g.wait_ready()
        body = {"rows": [TYPICAL_ROW], "coverage": 0.9}
        direct = g.post("/models/c/predict", json=body).json()
        via = requests.post(proxy.base + "/models/c/predict", json=body, timeout=30)
        assert via.status_code == 200 and via.headers["X-Model-Version"] == "1"
        assert via.json()["results"] == direct["results"]

        # a body sent slowly reaches kridge only once whole: kridge's own time for the
        # request stays far below the seconds the client took to send it
        raw = json.dumps(body).encode()
        with socket.create_connection(("127.0.0.1", proxy.port)) as s:
            s.sendall(b"POST /models/c/predict HTTP/1.1\r\nHost: x\r\nContent-Type: "
                      b"application/json\r\nX-Request-ID: slow-body\r\nConnection: close\r\n"
                      b"Content-Length: %d\r\n\r\n" % len(raw))
            started = time.monotonic()
            for i in range(0, len(raw), len(raw) // 8 + 1):
                s.sendall(raw[i:i + len(raw) // 8 + 1])
                time.sleep(0.3)
            sending = time.monotonic() - started
            s.settimeout(30)
            answer = b""
            while chunk := s.recv(65536):
                answer += chunk
        assert answer.startswith(b"HTTP/1.1 200"), answer[:200]
        line = next(json.loads(x) for x in log.read_text().splitlines()
                    if json.loads(x)["request_id"] == "slow-body")
        assert line["status"] == 200 and line["latency_ms"] < sending * 1000 / 4

        # over the byte limit, with a length or chunked: nginx's 413 in kridge's shape
        big = b'{"rows": [' + b" " * (9 << 20) + b"]}"
        for data in (big, iter([big[:1 << 20], big[1 << 20:]])):
            r = requests.post(proxy.base + "/models/c/predict", data=data, timeout=30,
                              headers={"Content-Type": "application/json"})
            assert r.status_code == 413
            assert set(r.json()["error"]) == {"code", "message", "details"}
            assert r.json()["error"]["code"] == "request_entity_too_large"
        # kridge's own refusals pass through unchanged
        r = requests.post(proxy.base + "/models/nope/predict", json=body, timeout=30)
        assert r.status_code == 404 and r.json()["error"]["code"] == "model_not_found"

    # with kridge gone, nginx answers in the same shape
    with Nginx(tmp_path / "nginx-alone", free_port(), f"127.0.0.1:{free_port()}") as alone:
        r = requests.get(alone.base + "/models", timeout=30)
        assert r.status_code == 503 and r.json()["error"]["code"] == "service_unavailable"


def test_shipped_config_matches_the_service_limits():
    """client_max_body_size is the service's byte limit; nginx's upstream keep-alive ends
    before kridge's (else nginx could reuse a connection kridge is closing)."""
    from service import gunicorn_config
    from service.settings import MAX_BODY_BYTES

    text = (ROOT / "deploy" / "nginx" / "kridge.conf").read_text()
    size = re.search(r"client_max_body_size (\d+)m;", text).group(1)
    assert int(size) << 20 == MAX_BODY_BYTES
    upstream_keepalive = re.search(r"keepalive_timeout (\d+)s;", text).group(1)
    assert int(upstream_keepalive) < gunicorn_config.keepalive
