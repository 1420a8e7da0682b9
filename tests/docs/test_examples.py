"""The README's and docs' examples, run or checked against the code, so that they cannot
drift from it: the reward request is sent with the README's own command and its output
compared byte for byte; the client snippet runs against the same server; every command
line in a fenced block uses only flags that `befit <command> --help` lists; every figure
between `<!--fig ...-->` marks equals its source (tools/docfigures.py)."""

from __future__ import annotations

import os
import pathlib
import re
import shlex
import socket
import subprocess
import sys
import tempfile
import time
import urllib.request
from typing import Iterator, List, Tuple

import pytest

REPO = pathlib.Path(__file__).resolve().parents[2]
BIN = pathlib.Path(os.environ.get("BEFIT_BIN") or REPO / "target" / "release" / "befit")
DOCS = [REPO / "README.md", REPO / "DEVELOPERS.md", *sorted((REPO / "docs").glob("*.md"))]
README = (REPO / "README.md").read_text()


def fenced_blocks(text: str) -> List[Tuple[str, str]]:
    """(info string, body) of every fenced code block."""
    return re.findall(r"^```(\w*)\n(.*?)^```", text, re.S | re.M)


def section(text: str, heading: str) -> str:
    start = text.index(heading)
    end = text.find("\n## ", start + len(heading))
    return text[start : end if end >= 0 else len(text)]


@pytest.fixture(scope="module")
def server() -> Iterator[str]:
    if not BIN.exists():
        pytest.fail(f"{BIN} missing: run `cargo build --release` (make test does)")
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    with tempfile.TemporaryDirectory() as data:
        # The flags of `make serve`, on another port.
        proc = subprocess.Popen(
            [str(BIN), "serve", "--bundle", "fixtures/models/blocks-v1", "--listen", f"127.0.0.1:{port}",
             "--data-dir", data, "--image-root", "fixtures/probe"],
            cwd=REPO, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
        )
        url = f"http://127.0.0.1:{port}"
        deadline = time.monotonic() + 60
        while True:
            try:
                urllib.request.urlopen(url + "/readyz", timeout=1).read()
                break
            except OSError:
                if proc.poll() is not None or time.monotonic() > deadline:
                    proc.kill()
                    pytest.fail("befit did not become ready")
                time.sleep(0.1)
        yield url
        proc.terminate()
        proc.wait(timeout=30)


def test_the_reward_request_answers_what_the_readme_shows(server):
    blocks = fenced_blocks(section(README, "## A reward request"))
    command = blocks[0][1]
    shown = next(body for info, body in blocks if info == "json")
    assert command.startswith("curl ") and "127.0.0.1:7878" in command
    out = subprocess.run(
        ["bash", "-c", command.replace("http://127.0.0.1:7878", server)],
        cwd=REPO, capture_output=True, text=True, check=True,
    )
    assert out.stdout == shown


def test_the_client_snippet_runs_as_written(server):
    code = next(body for info, body in fenced_blocks(section(README, "## From a training loop")) if info == "python")
    assert 'Client("http://127.0.0.1:7878"' in code
    code = code.replace("http://127.0.0.1:7878", server)
    env = dict(os.environ, PYTHONPATH=str(REPO / "clients" / "python" / "src"))
    # The snippet's last line is an expression a person would look at: print its shape.
    script = code + "\nprint(result.advantage.shape, result.model.id)\n"
    out = subprocess.run([sys.executable, "-c", script], cwd=REPO, env=env, capture_output=True, text=True)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "(2, 3) blocks@v1"


def command_lines() -> List[Tuple[str, str]]:
    """(file, command) of every `befit` command in a fenced block, continuations joined."""
    found = []
    for doc in DOCS:
        for info, body in fenced_blocks(doc.read_text()):
            if info not in ("", "sh", "bash", "console"):
                continue
            body = body.replace("\\\n", " ")
            for line in body.splitlines():
                line = line.strip().removeprefix("$ ")
                if re.match(r"^(target/release/)?befit\s", line):
                    found.append((doc.name, line.split("#", 1)[0].strip()))
    return found


COMMANDS = command_lines()


def test_the_docs_have_commands_to_check():
    # An extraction that found nothing would make the next test vacuous.
    assert len(COMMANDS) >= 9, COMMANDS


@pytest.mark.parametrize("doc,line", COMMANDS, ids=[f"{d}:{l[:40]}" for d, l in COMMANDS])
def test_every_documented_command_uses_flags_the_command_has(doc, line):
    words = shlex.split(line.replace("(", " ").replace(")", " ").replace("[", " ").replace("]", " ").replace("|", " "))
    sub = []
    for w in words[1:]:
        if not re.fullmatch(r"[a-z][a-z-]*", w):
            break
        sub.append(w)
    help_out = subprocess.run([str(BIN), *sub, "--help"], capture_output=True, text=True)
    assert help_out.returncode == 0, f"{doc}: `befit {' '.join(sub)}` is not a command: {help_out.stderr}"
    listed = set(re.findall(r"(?<![\w-])(--[a-z][a-z0-9-]*|-[a-zA-Z])\b", help_out.stdout))
    used = [w.split("=", 1)[0] for w in words if re.fullmatch(r"--?[a-zA-Z][a-zA-Z0-9-]*(=.*)?", w.split("=", 1)[0] + "")]
    missing = [w for w in used if w not in listed]
    assert not missing, f"{doc}: `{line}` uses {missing}, which `befit {' '.join(sub)} --help` does not list"


def test_every_figure_in_the_docs_equals_its_source():
    out = subprocess.run([sys.executable, str(REPO / "tools" / "docfigures.py"), "check"], capture_output=True, text=True)
    assert out.returncode == 0, out.stderr + out.stdout
    count = int(out.stdout.split()[0])
    assert count >= 10, out.stdout  # the figures marked so far; fewer means marks were lost
