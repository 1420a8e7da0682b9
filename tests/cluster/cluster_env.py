"""A befit cluster on loopback, laid out as deploy/kubernetes/ lays it out.

Reward replicas and one bank replica are real `befit serve` processes, each
with its own data folder, started with the config files of the ConfigMap
(`--bundle`, `--listen` and `--data-dir` given as flags, which override the
file, since the manifests' paths are the image's). A reverse proxy (nginx)
in front has the Ingress's routes, written from the Ingress manifest itself,
with the Services' session affinity. Everything listens on 127.0.0.1 only,
and :meth:`Cluster.stop` ends every process it started.
"""

from __future__ import annotations

import shutil
import subprocess
import sys
import time
import urllib.error
import urllib.request
from pathlib import Path
from typing import Any, Dict, List, Optional

import yaml

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from client.client_env import BUNDLE, REPO, BefitProcess, free_port  # noqa: E402

MANIFESTS = REPO / "deploy/kubernetes"


def manifests() -> List[Dict[str, Any]]:
    """Every object of every file in deploy/kubernetes/, with its file name
    under the key ``__file__``."""
    out = []
    for path in sorted(MANIFESTS.glob("*.yaml")):
        for doc in yaml.safe_load_all(path.read_text()):
            if doc:
                doc["__file__"] = path.name
                out.append(doc)
    return out


def find(kind: str, name: str) -> Dict[str, Any]:
    for doc in manifests():
        if doc["kind"] == kind and doc["metadata"]["name"] == name:
            return doc
    raise KeyError(f"no {kind} {name} in {MANIFESTS}")


def config_text(key: str) -> str:
    """One config file of the ConfigMap (``reward.toml``, ``bank.toml``)."""
    return find("ConfigMap", "befit-config")["data"][key]


def proxy_config(upstreams: Dict[str, List[str]], listen: str, prefix: Path) -> str:
    """nginx's configuration with the Ingress's routes: each path of the
    Ingress becomes a location sending to its backend Service's replicas
    (``upstreams``: Service name -> host:port list); a Service with
    ``sessionAffinity: ClientIP`` becomes an upstream hashed by client
    address. Ingress path types: Exact matches the path only, Prefix the path
    and whatever lies under it by whole segments."""
    ingress = find("Ingress", "befit")
    services = {d["metadata"]["name"]: d for d in manifests() if d["kind"] == "Service"}
    lines = [
        "daemon off;",
        "master_process off;",
        f"error_log {prefix}/error.log warn;",
        f"pid {prefix}/nginx.pid;",
        "events { worker_connections 1024; }",
        "http {",
        f"  access_log {prefix}/access.log;",
        f"  client_body_temp_path {prefix}/body;",
        f"  proxy_temp_path {prefix}/proxy;",
        f"  fastcgi_temp_path {prefix}/fastcgi;",
        f"  uwsgi_temp_path {prefix}/uwsgi;",
        f"  scgi_temp_path {prefix}/scgi;",
        # befit's own body limit answers too-large bodies; the proxy passes them on.
        "  client_max_body_size 64m;",
        "  proxy_http_version 1.1;",
        '  proxy_set_header Connection "";',
        "  proxy_read_timeout 120s;",
    ]
    for name, servers in upstreams.items():
        lines.append(f"  upstream {name} {{")
        if services[name]["spec"].get("sessionAffinity") == "ClientIP":
            lines.append("    ip_hash;")
        lines += [f"    server {s} max_fails=1 fail_timeout=5s;" for s in servers]
        lines += ["    keepalive 16;", "  }"]
    lines += ["  server {", f"    listen {listen};"]
    for rule in ingress["spec"]["rules"]:
        for p in rule["http"]["paths"]:
            backend = p["backend"]["service"]["name"]
            if backend not in upstreams:
                raise KeyError(f"the Ingress sends {p['path']} to Service {backend}, which has no replicas here")
            proxy = f"proxy_pass http://{backend};"
            if p["pathType"] == "Exact":
                lines.append(f"    location = {p['path']} {{ {proxy} }}")
            elif p["path"] == "/":
                lines.append(f"    location / {{ {proxy} }}")
            else:
                base = p["path"].rstrip("/")
                lines.append(f"    location = {base} {{ {proxy} }}")
                lines.append(f"    location {base}/ {{ {proxy} }}")
    lines += ["  }", "}"]
    return "\n".join(lines) + "\n"


def wait_answering(url: str, proc: subprocess.Popen, timeout: float, log: Path) -> None:
    """Waits until ``url`` answers 200, or raises with the end of ``log``
    when ``proc`` exits or ``timeout`` seconds pass first."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            raise RuntimeError(f"{proc.args[0]} exited with {proc.returncode}: {log.read_text()[-3000:]}")
        try:
            with urllib.request.urlopen(url, timeout=2) as r:
                if r.status == 200:
                    return
        except (urllib.error.URLError, ConnectionError, OSError):
            pass
        time.sleep(0.1)
    raise RuntimeError(f"{url} did not answer within {timeout} s: {log.read_text()[-3000:]}")


class Proxy:
    """nginx in the foreground with :func:`proxy_config`."""

    def __init__(self, upstreams: Dict[str, List[str]], workdir: Path) -> None:
        binary = shutil.which("nginx") or "/usr/sbin/nginx"
        workdir.mkdir(parents=True, exist_ok=True)
        self.port = free_port()
        self.url = f"http://127.0.0.1:{self.port}"
        conf = workdir / "proxy.conf"
        conf.write_text(proxy_config(upstreams, f"127.0.0.1:{self.port}", workdir))
        self.log = workdir / "error.log"
        self.proc = subprocess.Popen(
            [binary, "-p", str(workdir), "-c", str(conf)],
            stdout=subprocess.DEVNULL,
            stderr=open(workdir / "stderr.log", "wb"),
        )
        try:
            wait_answering(self.url + "/healthz", self.proc, 20, workdir / "stderr.log")
        except BaseException:
            self.stop()
            raise

    def stop(self) -> None:
        if self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()


class Cluster:
    """``rewards`` reward replicas, one bank replica and the proxy (which
    needs the bank replica)."""

    def __init__(self, workdir: Path, rewards: int = 3, proxy: bool = True, bank: bool = True) -> None:
        self.workdir = workdir
        self.replicas: List[BefitProcess] = []
        self.bank: Optional[BefitProcess] = None
        self.proxy: Optional[Proxy] = None
        try:
            workdir.mkdir(parents=True, exist_ok=True)
            reward_toml = workdir / "reward.toml"
            reward_toml.write_text(config_text("reward.toml"))
            bank_toml = workdir / "bank.toml"
            bank_toml.write_text(config_text("bank.toml"))
            for i in range(rewards):
                self.replicas.append(self._start(f"reward-{i}", reward_toml))
            if bank:
                self.bank = self._start("bank-0", bank_toml)
            if proxy and self.bank is not None:
                self.proxy = Proxy(
                    {
                        "befit-reward": [r.url.split("//", 1)[1] for r in self.replicas],
                        "befit-bank": [self.bank.url.split("//", 1)[1]],
                    },
                    workdir / "proxy",
                )
        except BaseException:
            self.stop()
            raise

    def _start(self, name: str, config: Path) -> BefitProcess:
        folder = self.workdir / name
        folder.mkdir(parents=True, exist_ok=True)
        return BefitProcess(BUNDLE, folder / "data", folder / "befit.log", ["--config", str(config)])

    @property
    def urls(self) -> List[str]:
        return [r.url for r in self.replicas]

    def stop(self) -> None:
        """Stops the proxy and every replica, whatever state each is in."""
        if self.proxy is not None:
            self.proxy.stop()
        for proc in self.replicas + ([self.bank] if self.bank is not None else []):
            proc.stop()
