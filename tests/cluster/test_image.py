"""The image `make image` built ($BEFIT_IMAGE), run from its own filesystem.

Containers cannot be started on every machine that builds images (no
cgroups, no registry), so the service is run with `buildah run --isolation
chroot`: the image's filesystem, environment and user, the host's loopback.
The command run is the image's ENTRYPOINT + CMD, as a container runtime would
run it; only BEFIT_LISTEN is set, to a free loopback port. The reference is
the release binary on the host with the same bundle. Run by `make image-test`.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
from pathlib import Path
from typing import Any, Dict, Iterator, List

import numpy as np
import pytest
from befit_client import Client, clip_s

from .cluster_env import BUNDLE, wait_answering
from client.client_env import PROBE_DIR, BefitProcess, free_port

IMAGE = os.environ.get("BEFIT_IMAGE")
pytestmark = pytest.mark.skipif(not IMAGE, reason="no image named: run `make image-test`")

USER_ID = 10001  # docker/Dockerfile's user


def run(*args: str, timeout: float = 120) -> str:
    return subprocess.run(args, check=True, capture_output=True, text=True, timeout=timeout).stdout.strip()


@pytest.fixture(scope="module")
def config() -> Dict[str, Any]:
    """The image's Docker-format configuration."""
    doc = json.loads(run("buildah", "inspect", "--type", "image", str(IMAGE)))
    return doc["Docker"]["config"]


@pytest.fixture(scope="module")
def container() -> Iterator[Dict[str, Any]]:
    """A working container of the image, with its root filesystem mounted."""
    name = run("buildah", "from", "--pull-never", str(IMAGE))
    try:
        yield {"name": name, "root": Path(run("buildah", "mount", name))}
    finally:
        subprocess.run(["buildah", "rm", name], capture_output=True, timeout=60)


class ImageService:
    """The image's ENTRYPOINT + CMD under `buildah run`, on a loopback port."""

    def __init__(self, container: str, config: Dict[str, Any], log: Path) -> None:
        self.port = free_port()
        self.url = f"http://127.0.0.1:{self.port}"
        self.container = container
        command = list(config.get("Entrypoint") or []) + list(config.get("Cmd") or [])
        self._log = open(log, "wb")
        self.log = log
        self.proc = subprocess.Popen(
            ["buildah", "run", "--isolation", "chroot", *self.env_flags(), container, "--", *command],
            stdout=self._log,
            stderr=subprocess.STDOUT,
            start_new_session=True,
        )
        try:
            wait_answering(self.url + "/readyz", self.proc, 120, log)
        except BaseException:
            self.stop()
            raise

    def env_flags(self) -> List[str]:
        return ["--env", f"BEFIT_LISTEN=127.0.0.1:{self.port}"]

    def exec(self, *command: str) -> int:
        """Runs a command in the same container (the HEALTHCHECK, say)."""
        done = subprocess.run(
            ["buildah", "run", "--isolation", "chroot", *self.env_flags(), self.container, "--", *command],
            capture_output=True,
            timeout=60,
        )
        return done.returncode

    def servers(self) -> Dict[int, int]:
        """The befit processes under this run: pid -> real uid."""
        found = {}
        for status in Path("/proc").glob("[0-9]*/status"):
            try:
                text = status.read_text()
                if os.getsid(int(status.parent.name)) != self.proc.pid:
                    continue
            except (OSError, ProcessLookupError):
                continue
            fields = dict(line.split(":", 1) for line in text.splitlines() if ":" in line)
            if fields.get("Name", "").strip() == "befit":
                found[int(status.parent.name)] = int(fields["Uid"].split()[0])
        return found

    def stop(self) -> None:
        if self.proc.poll() is None:
            try:
                os.killpg(self.proc.pid, signal.SIGTERM)
                self.proc.wait(timeout=30)
            except (subprocess.TimeoutExpired, ProcessLookupError):
                os.killpg(self.proc.pid, signal.SIGKILL)
                self.proc.wait()
        self._log.close()


@pytest.fixture(scope="module")
def service(container, config, tmp_path_factory) -> Iterator[ImageService]:
    svc = ImageService(container["name"], config, tmp_path_factory.mktemp("image") / "befit.log")
    try:
        yield svc
    finally:
        svc.stop()


def test_the_image_is_configured_to_run_befit_as_a_non_root_user(config, container):
    assert config["User"] == f"{USER_ID}:{USER_ID}"
    env = dict(e.split("=", 1) for e in config["Env"])
    assert env["BEFIT_CONFIG"] == "/etc/befit/serve.toml"
    root = container["root"]
    assert (root / env["ORT_DYLIB_PATH"].lstrip("/")).is_file()
    assert (root / "models/blocks-v1/bundle.toml").is_file()
    assert (root / "data").stat().st_uid == USER_ID
    assert config["Healthcheck"]["Test"] == ["CMD", "/usr/local/bin/befit-healthcheck"]
    assert "7878/tcp" in config["ExposedPorts"]
    # The binary ships without debug info (Cargo.toml's release profile).
    sections = run("readelf", "-S", "-W", str(root / "usr/local/bin/befit"))
    assert ".text" in sections and ".debug_info" not in sections


def test_the_image_serves_the_same_rewards_as_the_binary(service, tmp_path):
    rows = [json.loads(line) for line in (PROBE_DIR / "probe.jsonl").read_text().splitlines()[:12]]
    images = [(PROBE_DIR / r["image"]).read_bytes() for r in rows]
    captions = [r["captions"] for r in rows]
    with Client(service.url) as c:
        got = c.rewards(images, captions, scale=clip_s(2.5), baseline="mean-of-others")
    host = BefitProcess(BUNDLE, tmp_path / "data", tmp_path / "befit.log")
    try:
        with Client(host.url) as c:
            want = c.rewards(images, captions, scale=clip_s(2.5), baseline="mean-of-others")
    finally:
        host.stop()
    assert got.model.digest == want.model.digest
    # Same binary, bundle and ONNX Runtime: equal to float32 rounding.
    np.testing.assert_allclose(got.reward, want.reward, rtol=0, atol=2.5e-6)
    # It ran as the image's user, and wrote its data folder (the image's
    # VOLUME, seen through the process's own root) as that user.
    servers = service.servers()
    assert list(servers.values()) == [USER_ID]
    (pid,) = servers
    assert Path(f"/proc/{pid}/root/data/images.sqlite").stat().st_uid == USER_ID


def test_the_healthcheck_passes_while_serving_and_fails_when_stopped(service):
    assert service.exec("/usr/local/bin/befit-healthcheck") == 0
    service.stop()
    assert service.exec("/usr/local/bin/befit-healthcheck") != 0
