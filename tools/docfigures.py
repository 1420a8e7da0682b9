"""Figures quoted in the docs, tied to where they come from, so they cannot go stale.

A figure in a Markdown file is written between two comments that Markdown
does not show:

    greedy correctness reaches <!--fig run:blocks_rl:summary.greedy_correct_end f3-->0.587<!--/fig-->

The first word names the source, the second the format:

- ``card:BUNDLE:PATH``: a value of ``fixtures/models/BUNDLE/card.json`` (the
  bundle's own card, written when it was trained; its file hashes are checked
  against the bundle's files, so a card of an older model is caught);
- ``run:NAME:PATH``: a value of a measured run recorded in
  ``docs/figures.json`` with the digest of the bundle it ran on (a run on
  another digest than the bundle's current one is stale).

PATH is dotted keys and list indices (``history.-1.greedy_count``). Formats:
``f1``..``f4`` (fixed decimals), ``pct0``/``pct1`` (a fraction as a percent),
``int`` (thousands separated by commas), ``s0``/``s1`` (seconds, "24 s").

    python tools/docfigures.py check     # every figure equals its source; every run is fresh
    python tools/docfigures.py write     # rewrite every figure from its source
    python tools/docfigures.py measure   # run the measured runs again on the bundled models, then write

``measure`` starts ``target/release/befit serve`` on a free loopback port
with a fresh data folder, runs ``examples/blocks_rl.py`` against it, and
records the run; ``make figures`` calls it.
"""

from __future__ import annotations

import argparse
import datetime
import hashlib
import json
import os
import pathlib
import re
import socket
import subprocess
import sys
import tempfile
import time
import tomllib
import urllib.request
from typing import Any, Dict, List, Tuple

REPO = pathlib.Path(__file__).resolve().parents[1]
FIGURES = REPO / "docs" / "figures.json"
DOCS = [REPO / "README.md", *sorted((REPO / "docs").glob("*.md"))]
MARK = re.compile(r"<!--fig (\S+) (\S+?)-->(.*?)<!--/fig-->", re.S)


def bundle_digest(bundle: pathlib.Path) -> str:
    """befit's bundle digest, as docs/bundles.md defines it (hashlib)."""
    manifest = tomllib.loads((bundle / "bundle.toml").read_text())
    names = [
        "bundle.toml",
        manifest["image"]["file"],
        manifest["text"]["file"],
        manifest["text"].get("tokenizer", "tokenizer.json"),
    ]
    if "fluency" in manifest:  # the optional head comes last
        names.append(manifest["fluency"]["file"])
    outer = hashlib.sha256()
    for name in names:
        outer.update(name.encode() + b"\0" + hashlib.sha256((bundle / name).read_bytes()).digest())
    return outer.hexdigest()


def dig(doc: Any, path: str) -> Any:
    for key in path.split("."):
        if isinstance(doc, list):
            doc = doc[int(key)]
        elif isinstance(doc, dict) and key in doc:
            doc = doc[key]
        else:
            raise KeyError(f"no {key!r} on the way to {path!r}")
    return doc


def fmt(value: Any, form: str) -> str:
    if form.startswith("f") and form[1:].isdigit():
        return f"{float(value):.{int(form[1:])}f}"
    if form.startswith("pct") and form[3:].isdigit():
        return f"{100 * float(value):.{int(form[3:])}f}%"
    if form.startswith("s") and form[1:].isdigit():
        return f"{float(value):.{int(form[1:])}f} s"
    if form == "int":
        return f"{int(value):,}"
    raise ValueError(f"unknown figure format {form!r}")


class Sources:
    """Reads cards and recorded runs once, and says what is stale."""

    def __init__(self) -> None:
        self.runs: Dict[str, Any] = json.loads(FIGURES.read_text()) if FIGURES.exists() else {}
        self.cards: Dict[str, Any] = {}

    def card(self, bundle: str) -> Any:
        if bundle not in self.cards:
            self.cards[bundle] = json.loads((REPO / "fixtures" / "models" / bundle / "card.json").read_text())
        return self.cards[bundle]

    def value(self, source: str) -> Any:
        kind, name, path = source.split(":", 2)
        if kind == "card":
            return dig(self.card(name), path)
        if kind == "run":
            if name not in self.runs:
                raise KeyError(f"no run {name!r} in {FIGURES.relative_to(REPO)}")
            return dig(self.runs[name], path)
        raise ValueError(f"unknown figure source {kind!r} in {source!r}")

    def stale(self) -> List[str]:
        problems = []
        for bundle in sorted({m.split(":")[1] for m in self.used() if m.startswith("card:")}):
            folder = REPO / "fixtures" / "models" / bundle
            for name, entry in self.card(bundle).get("files", {}).items():
                actual = hashlib.sha256((folder / name).read_bytes()).hexdigest()
                if actual != entry["sha256"]:
                    problems.append(f"{folder.relative_to(REPO)}/card.json describes another {name} (sha256 {entry['sha256'][:12]}, file {actual[:12]})")
        for name, run in sorted(self.runs.items()):
            bundle = REPO / run["bundle"]
            now = bundle_digest(bundle)
            if run["digest"] != now:
                problems.append(
                    f"run {name!r} in docs/figures.json was measured on {run['bundle']} digest {run['digest'][:12]}, "
                    f"which is now {now[:12]}: run `make figures`"
                )
        return problems

    def used(self) -> List[str]:
        return [m.group(1) for doc in DOCS for m in MARK.finditer(doc.read_text())]


def figures(sources: Sources) -> List[Tuple[pathlib.Path, str, str, str, str]]:
    """(file, source, format, written, expected) of every figure in the docs."""
    out = []
    for doc in DOCS:
        for m in MARK.finditer(doc.read_text()):
            out.append((doc, m.group(1), m.group(2), m.group(3), fmt(sources.value(m.group(1)), m.group(2))))
    return out


def check() -> int:
    sources = Sources()
    problems = sources.stale()
    found = figures(sources)
    for doc, source, form, written, expected in found:
        if written != expected:
            problems.append(f"{doc.relative_to(REPO)}: {source} {form} says {written!r}, the source gives {expected!r}")
    for p in problems:
        print(p, file=sys.stderr)
    print(f"{len(found)} figures in {len(DOCS)} files checked; {len(problems)} problem(s)")
    return 1 if problems else 0


def write() -> int:
    sources = Sources()
    changed = 0
    for doc in DOCS:
        text = doc.read_text()

        def repl(m: re.Match) -> str:
            return f"<!--fig {m.group(1)} {m.group(2)}-->{fmt(sources.value(m.group(1)), m.group(2))}<!--/fig-->"

        new = MARK.sub(repl, text)
        if new != text:
            doc.write_text(new)
            changed += 1
    print(f"rewrote figures in {changed} file(s)")
    return 0


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def measure_rl() -> Dict[str, Any]:
    binary = REPO / "target" / "release" / "befit"
    if not binary.exists():
        raise SystemExit("target/release/befit missing: run `make build` first")
    bundle = "fixtures/models/blocks-v1"
    port = free_port()
    with tempfile.TemporaryDirectory() as data:
        server = subprocess.Popen(
            [str(binary), "serve", "--bundle", bundle, "--listen", f"127.0.0.1:{port}", "--data-dir", data,
             "--image-root", "fixtures/probe"],
            cwd=REPO, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
        )
        try:
            deadline = time.monotonic() + 60
            while True:
                try:
                    urllib.request.urlopen(f"http://127.0.0.1:{port}/readyz", timeout=1).read()
                    break
                except OSError:
                    if time.monotonic() > deadline or server.poll() is not None:
                        raise SystemExit("befit did not become ready within 60 s")
                    time.sleep(0.2)
            log = pathlib.Path(data) / "rl.json"
            command = ["examples/blocks_rl.py", "--url", f"http://127.0.0.1:{port}", "--log", str(log),
                       "--plot", str(pathlib.Path(data) / "rl.png")]
            subprocess.run([sys.executable, *command], cwd=REPO, check=True)
            record = json.loads(log.read_text())
        finally:
            server.terminate()
            server.wait(timeout=30)
    last = record["history"][-1]
    return {
        "bundle": bundle,
        "digest": bundle_digest(REPO / bundle),
        "measured": datetime.date.today().isoformat(),
        "command": "examples/blocks_rl.py with its defaults",
        "machine": f"{os.cpu_count()} cores",
        "summary": record["summary"],
        "last_step": last,
    }


def measure_calibration(bundle: str) -> Dict[str, Any]:
    """`befit calibrate --json` of a bundled model on the bundled probe set."""
    binary = REPO / "target" / "release" / "befit"
    out = subprocess.run(
        [str(binary), "calibrate", "--bundle", bundle, "--probe", "fixtures/probe/probe.jsonl", "--json"],
        cwd=REPO, capture_output=True, text=True, check=True,
    )
    report = json.loads(out.stdout)
    return {
        "bundle": bundle,
        "digest": bundle_digest(REPO / bundle),
        "measured": datetime.date.today().isoformat(),
        "command": f"befit calibrate --bundle {bundle} --probe fixtures/probe/probe.jsonl --json",
        "retrieval": report["retrieval"],
        "contrast": report["contrast"]["overall"],
    }


def measure() -> int:
    runs = json.loads(FIGURES.read_text()) if FIGURES.exists() else {}
    runs["calibrate_blocks_v1"] = measure_calibration("fixtures/models/blocks-v1")
    runs["blocks_rl"] = measure_rl()
    FIGURES.write_text(json.dumps(runs, indent=1, sort_keys=True) + "\n")
    return write()


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("action", choices=("check", "write", "measure"))
    action = p.parse_args().action
    return {"check": check, "write": write, "measure": measure}[action]()


if __name__ == "__main__":
    sys.exit(main())
