"""befit under abuse and faults, against the release binary on loopback: `make soak`.

Phases, each bounded in time and count, each printing its figures:
1. capacity: 4 clients back to back (16 groups x 32 distinct captions a request, caption cache
   off) for CAPACITY_S: successful requests a second;
2. 3x load: requests offered at three times that rate for LOAD_S (open loop: a request is sent at
   its time whether or not earlier ones were answered): successful throughput against capacity,
   p99 of accepted requests, median time of a 503;
3. slow clients: 200 connections trickling their headers and 100 trickling a body, while one
   client sends normal requests: their success and p99;
4. idle sockets: 2,000 connections that never send a byte, then normal requests;
5. image bombs: PNGs declaring 40,000 x 40,000 pixels in a few hundred bytes: every one refused
   with `image_too_large`, peak memory after;
6. kill -9 during writes: two writers append captions to the bank and register images; the server
   is killed with SIGKILL mid-way and started again on the same data folder: acknowledged
   captions and images missing after the restart (must be 0);
7. damaged files: a map file of garbage and a truncated index dump; the server must start, serve,
   and name the unusable map in /readyz.

Every request goes to 127.0.0.1 only. Prints the figures; exits non-zero if an acknowledged item
is lost, the server fails to start after the faults, or a bomb is not refused.

    python tests/soak/soak.py [--max-queue-wait-ms N] [--json FILE] [--load-only] [--shared-cores]

On a machine of two or more cores, befit runs alone on the first core and this generator on the
others, as if the load came from another machine; `--shared-cores` lets them share every core.
"""

from __future__ import annotations

import argparse
import base64
import http.client
import json
import os
import resource
import signal
import socket
import struct
import subprocess
import sys
import tempfile
import threading
import time
import zlib
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]
BIN = Path(os.environ.get("BEFIT_BIN", REPO / "target" / "release" / "befit"))
CAPACITY_S, LOAD_S = 6.0, 8.0
GROUPS, CAPTIONS = 16, 32
WORDS = ["red", "green", "blue", "yellow", "purple", "orange", "small", "large", "circle", "square",
         "triangle", "cross", "ring", "left", "right", "above", "below", "table", "piece", "two"]


def caption(i: int) -> str:
    """A distinct caption per i (no cache helps)."""
    parts, n = [], i
    for _ in range(6):
        parts.append(WORDS[n % len(WORDS)])
        n //= len(WORDS)
    return "a " + " ".join(parts) + f" {i}"


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class Server:
    def __init__(self, data_dir: str, extra: list[str], cores: set[int] | None = None):
        self.port = free_port()
        # Pinned before exec, so befit sizes its thread pools to the cores it is given.
        pin = (lambda: os.sched_setaffinity(0, cores)) if cores else None
        self.proc = subprocess.Popen(
            [str(BIN), "serve", "--bundle", str(REPO / "fixtures/models/blocks-v1"), "--listen",
             f"127.0.0.1:{self.port}", "--data-dir", data_dir, "--image-root", str(REPO / "fixtures/probe"),
             "--caption-cache", "0", *extra],
            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True, preexec_fn=pin)
        deadline = time.time() + 60
        while time.time() < deadline:
            if self.proc.poll() is not None:
                raise RuntimeError(f"befit exited: {self.proc.stderr.read()[-2000:]}")
            try:
                if request(self.port, "GET", "/readyz")[0] == 200:
                    return
            except OSError:
                pass
            time.sleep(0.1)
        raise RuntimeError("befit did not become ready in 60 s")

    def cpu_seconds(self) -> float:
        """User + system CPU time of the server so far (/proc/PID/stat fields 14 and 15)."""
        fields = Path(f"/proc/{self.proc.pid}/stat").read_text().rsplit(")", 1)[1].split()
        return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")

    def peak_rss_mb(self) -> float:
        for line in Path(f"/proc/{self.proc.pid}/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024
        return float("nan")

    def stop(self, sig=signal.SIGTERM) -> None:
        if self.proc.poll() is None:
            self.proc.send_signal(sig)
            try:
                self.proc.wait(timeout=60)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()


def request(port: int, method: str, path: str, body: bytes | None = None, timeout: float = 60):
    conn = http.client.HTTPConnection("127.0.0.1", port, timeout=timeout)
    try:
        conn.request(method, path, body, {"Content-Type": "application/json"} if body else {})
        r = conn.getresponse()
        return r.status, r.read()
    finally:
        conn.close()


def post(port: int, path: str, obj) -> tuple[int, dict]:
    status, data = request(port, "POST", path, json.dumps(obj).encode())
    try:
        return status, json.loads(data)
    except ValueError:
        return status, {}


def reward_bodies(ids: list[str], n: int, start: int) -> list[bytes]:
    out, k = [], start
    for _ in range(n):
        groups = []
        for g in range(GROUPS):
            groups.append({"image": {"id": ids[g % len(ids)]}, "captions": [caption(k + c) for c in range(CAPTIONS)]})
            k += CAPTIONS
        out.append(json.dumps({"groups": groups}).encode())
    return out


def pct(values: list[float], q: float) -> float:
    if not values:
        return float("nan")
    values = sorted(values)
    return values[min(len(values) - 1, int(q * len(values)))]


def timed(port: int, body: bytes) -> tuple[int, float]:
    t = time.perf_counter()
    try:
        status, _ = request(port, "POST", "/v1/rewards", body, timeout=120)
    except OSError:
        status = 0
    return status, time.perf_counter() - t


def capacity(port: int, ids: list[str]) -> float:
    bodies = iter(reward_bodies(ids, 2000, 10_000_000))
    ok, lock, stop = [0], threading.Lock(), time.time() + CAPACITY_S

    def client():
        while time.time() < stop:
            status, _ = timed(port, next(bodies))
            with lock:
                ok[0] += status == 200

    threads = [threading.Thread(target=client) for _ in range(4)]
    [t.start() for t in threads]
    [t.join() for t in threads]
    return ok[0] / CAPACITY_S


def open_loop(port: int, ids: list[str], rate: float, seconds: float, start: int) -> dict:
    """Requests sent at `rate` a second for `seconds`, each on its own thread when due."""
    n = int(rate * seconds)
    bodies = reward_bodies(ids, n, start)
    results: list[tuple[int, float]] = []
    lock = threading.Lock()

    def one(body):
        r = timed(port, body)
        with lock:
            results.append(r)

    threads, t0 = [], time.perf_counter()
    for i, body in enumerate(bodies):
        due = t0 + i / rate
        time.sleep(max(0.0, due - time.perf_counter()))
        th = threading.Thread(target=one, args=(body,))
        th.start()
        threads.append(th)
    [t.join(timeout=120) for t in threads]
    elapsed = max(seconds, time.perf_counter() - t0)
    accepted = [s for code, s in results if code == 200]
    refused = [s for code, s in results if code == 503]
    return {"offered_per_s": rate, "ok_per_s": len(accepted) / elapsed, "accepted": len(accepted),
            "refused": len(refused), "other": len(results) - len(accepted) - len(refused),
            "p99_accepted_ms": 1e3 * pct(accepted, 0.99), "median_503_ms": 1e3 * pct(refused, 0.5)}


def trickle(port: int, head: bytes, seconds: float, stop: threading.Event) -> None:
    try:
        s = socket.create_connection(("127.0.0.1", port), timeout=5)
        for b in head:
            if stop.is_set():
                break
            s.sendall(bytes([b]))
            time.sleep(seconds)
        s.close()
    except OSError:
        pass  # closed by the server: what a slow client should get


def slow_clients(port: int, ids: list[str]) -> dict:
    stop = threading.Event()
    head = b"POST /v1/rewards HTTP/1.1\r\nHost: 127.0.0.1\r\nContent-Type: application/json\r\nContent-Length: 100000\r\n\r\n"
    threads = [threading.Thread(target=trickle, args=(port, head, 0.5, stop), daemon=True) for _ in range(200)]
    threads += [threading.Thread(target=trickle, args=(port, head + b"{" * 400, 0.05, stop), daemon=True)
                for _ in range(100)]
    [t.start() for t in threads]
    time.sleep(1.0)
    bodies = reward_bodies(ids, 20, 20_000_000)
    results = [timed(port, b) for b in bodies]
    stop.set()
    ok = [s for code, s in results if code == 200]
    return {"normal_ok": len(ok), "normal_sent": len(results), "p99_ms": 1e3 * pct(ok, 0.99)}


def idle_sockets(port: int, ids: list[str], count: int = 2000) -> dict:
    soft, hard = resource.getrlimit(resource.RLIMIT_NOFILE)
    resource.setrlimit(resource.RLIMIT_NOFILE, (min(hard, max(soft, count + 512)), hard))
    socks = []
    for _ in range(count):
        try:
            socks.append(socket.create_connection(("127.0.0.1", port), timeout=5))
        except OSError:
            break
    results = [timed(port, b) for b in reward_bodies(ids, 10, 30_000_000)]
    health = request(port, "GET", "/healthz")[0]
    for s in socks:
        s.close()
    return {"idle_opened": len(socks), "normal_ok": sum(c == 200 for c, _ in results), "normal_sent": len(results),
            "healthz": health}


def bomb_png(width: int, height: int) -> bytes:
    """A PNG whose header declares width x height (16-bit RGB) with a tiny compressed body."""
    def chunk(kind: bytes, data: bytes) -> bytes:
        return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data))
    ihdr = struct.pack(">IIBBBBB", width, height, 16, 2, 0, 0, 0)
    return b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", ihdr) + chunk(b"IDAT", zlib.compress(b"\0" * 4096, 9)) + chunk(b"IEND", b"")


def bombs(server: Server) -> dict:
    codes = []
    for i in range(20):
        png = bomb_png(40_000 + i, 40_000)
        status, body = post(server.port, "/v1/images", {"images": [{"base64": base64.b64encode(png).decode()}]})
        codes.append((status, body.get("error", {}).get("code")))
    refused = sum(1 for s, c in codes if s in (400, 413, 422) and c == "image_too_large")
    return {"bombs": len(codes), "refused_image_too_large": refused, "peak_rss_mb": server.peak_rss_mb(),
            "codes": sorted({f"{s} {c}" for s, c in codes})}


def tiny_png(i: int) -> bytes:
    """A distinct 8x8 RGB PNG per i."""
    raw = b"".join(b"\0" + bytes([(i >> 8) & 255, i & 255, (x * 31 + y) & 255] * 8) for y in range(8) for x in [y])
    def chunk(kind, data):
        return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data))
    return (b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", struct.pack(">IIBBBBB", 8, 8, 8, 2, 0, 0, 0))
            + chunk(b"IDAT", zlib.compress(raw)) + chunk(b"IEND", b""))


def kill_during_writes(data_dir: str) -> dict:
    server = Server(data_dir, [])
    acked_captions: list[str] = []
    acked_images: list[str] = []
    stop = threading.Event()

    def captions_writer():
        k = 0
        while not stop.is_set():
            batch = [f"soak caption {k + j} on the table" for j in range(50)]
            k += 50
            try:
                status, _ = post(server.port, "/v1/bank", {"captions": batch, "tag": "soak"})
            except OSError:
                return
            if status == 200:
                acked_captions.extend(batch)

    def images_writer():
        k = 0
        while not stop.is_set():
            pngs = [tiny_png(k + j) for j in range(8)]
            k += 8
            try:
                status, body = post(server.port, "/v1/images",
                                    {"images": [{"base64": base64.b64encode(p).decode()} for p in pngs]})
            except OSError:
                return
            if status == 200:
                acked_images.extend(i["id"] for i in body["images"])

    writers = [threading.Thread(target=captions_writer), threading.Thread(target=images_writer)]
    [t.start() for t in writers]
    time.sleep(3.0)
    server.proc.send_signal(signal.SIGKILL)
    server.proc.wait()
    stop.set()
    [t.join(timeout=30) for t in writers]
    server = Server(data_dir, [])
    try:
        status, stats = request(server.port, "GET", "/v1/bank")
        bank = json.loads(stats)
        tags = bank.get("tags", {})
        lost_captions = max(0, len(set(acked_captions)) - int(tags.get("soak", 0)))
        lost_images = 0
        for i in range(0, len(acked_images), 256):
            status, body = post(server.port, "/v1/vectors", {"images": [{"id": x} for x in acked_images[i : i + 256]]})
            if status != 200:
                lost_images += len(acked_images[i : i + 256])
    finally:
        server.stop()
    return {"acked_captions": len(set(acked_captions)), "lost_captions": lost_captions,
            "acked_images": len(acked_images), "lost_images": lost_images}


def damaged_files(data_dir: str) -> dict:
    maps = Path(data_dir) / "maps"
    maps.mkdir(exist_ok=True)
    (maps / "garbage.json").write_bytes(os.urandom(300))
    dumps = [p for p in Path(data_dir).rglob("*") if p.is_file() and "index" in str(p)]
    for p in dumps[:2]:
        p.write_bytes(p.read_bytes()[: max(0, p.stat().st_size // 2)])
    try:
        server = Server(data_dir, [])
    except RuntimeError as e:
        return {"started": False, "error": str(e)[-300:]}
    try:
        status, ready = request(server.port, "GET", "/readyz")
        body = json.loads(ready)
        served = post(server.port, "/v1/neighbors", {"text": "soak caption 3 on the table", "k": 3})[0]
    finally:
        server.stop()
    return {"started": True, "readyz": status, "maps_unusable": body.get("maps_unusable"),
            "truncated_dumps": len(dumps[:2]), "neighbors_status": served}


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--max-queue-wait-ms", type=int, default=None)
    ap.add_argument("--json", type=Path, default=None)
    ap.add_argument("--load-only", action="store_true", help="capacity and 3x load only (to compare settings)")
    ap.add_argument("--shared-cores", action="store_true",
                    help="run befit and the load generator on the same cores (default: on a machine of 2 "
                         "or more cores, befit gets core 0 alone and the generator the others)")
    args = ap.parse_args()
    cores = sorted(os.sched_getaffinity(0))
    server_cores = None if args.shared_cores or len(cores) < 2 else {cores[0]}
    if server_cores:
        # The generator would otherwise take its CPU from befit's: at 3x load it needs about half
        # a core, which is capacity befit measured in phase 1 but cannot have in phase 2.
        os.sched_setaffinity(0, set(cores[1:]))
    if not BIN.exists():
        print(f"{BIN} missing: make build", file=sys.stderr)
        return 2
    extra = [] if args.max_queue_wait_ms is None else ["--max-queue-wait-ms", str(args.max_queue_wait_ms)]
    figures: dict = {"max_queue_wait_ms": args.max_queue_wait_ms,
                     "server_cores": sorted(server_cores) if server_cores else "shared"}
    print(f"befit on cores {figures['server_cores']}, the generator on "
          f"{sorted(os.sched_getaffinity(0))}", flush=True)
    with tempfile.TemporaryDirectory() as data_dir:
        server = Server(data_dir, extra, server_cores)
        try:
            rows = [json.loads(l) for l in (REPO / "fixtures/probe/probe.jsonl").read_text().splitlines()[:16]]
            ids = [i["id"] for i in post(server.port, "/v1/images", {"images": [{"path": r["image"]} for r in rows]})[1]["images"]]
            # CPU seconds of the server and of this generator in each phase: the two share the
            # machine's cores, so successful requests per server CPU second tell befit's shedding
            # apart from the generator's share of the cores.
            cpu0, gen0 = server.cpu_seconds(), time.process_time()
            cap = capacity(server.port, ids)
            cpu1, gen1 = server.cpu_seconds(), time.process_time()
            figures["capacity_per_s"] = cap
            cap_per_cpu = cap * CAPACITY_S / (cpu1 - cpu0)
            print(f"capacity: {cap:.1f} requests/s ({cap * GROUPS * CAPTIONS:.0f} captions/s); "
                  f"server {cpu1 - cpu0:.1f} CPU s, generator {gen1 - gen0:.1f} CPU s", flush=True)
            load = open_loop(server.port, ids, 3 * cap, LOAD_S, 40_000_000)
            cpu2, gen2 = server.cpu_seconds(), time.process_time()
            load["ok_over_capacity"] = load["ok_per_s"] / cap
            load["server_cpu_s"], load["generator_cpu_s"] = cpu2 - cpu1, gen2 - gen1
            load["ok_per_server_cpu_s_over_capacity"] = (
                load["accepted"] / (cpu2 - cpu1) / cap_per_cpu)
            figures["load_3x"] = load
            print(f"3x load: {json.dumps(load)}", flush=True)
            if args.load_only:
                return 0
            figures["slow_clients"] = slow_clients(server.port, ids)
            print(f"slow clients: {json.dumps(figures['slow_clients'])}", flush=True)
            figures["idle_sockets"] = idle_sockets(server.port, ids)
            print(f"idle sockets: {json.dumps(figures['idle_sockets'])}", flush=True)
            figures["bombs"] = bombs(server)
            print(f"image bombs: {json.dumps(figures['bombs'])}", flush=True)
            figures["peak_rss_mb"] = server.peak_rss_mb()
        finally:
            server.stop()
    with tempfile.TemporaryDirectory() as data_dir:
        figures["kill_9"] = kill_during_writes(data_dir)
        print(f"kill -9 during writes: {json.dumps(figures['kill_9'])}", flush=True)
        figures["damaged"] = damaged_files(data_dir)
        print(f"damaged files: {json.dumps(figures['damaged'])}", flush=True)
    print(f"peak RSS during load, slow clients, idle sockets and bombs: {figures['peak_rss_mb']:.0f} MB")
    if args.json:
        args.json.write_text(json.dumps(figures, indent=2) + "\n")
    k = figures["kill_9"]
    failed = (k["lost_captions"] or k["lost_images"] or not figures["damaged"].get("started")
              or figures["bombs"]["refused_image_too_large"] != figures["bombs"]["bombs"])
    print("soak: FAILED" if failed else "soak: every acknowledged item kept, every fault survived")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
