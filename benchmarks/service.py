"""Throughput and latency of the live service: analyses versus liveness checks, side by side.

Starts `python -m service serve` on 127.0.0.1 (a free port, a temporary SQLite archive), sends a
fixed number of requests from a few concurrent clients, prints a table, stops the server.

    .venv/bin/python benchmarks/service.py [--posts 240] [--health 2000] [--clients 8]
"""

from __future__ import annotations

import argparse
import json
import os
import socket
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import httpx
import numpy as np
from machine import StolenTime  # benchmarks/machine.py (this folder is on sys.path)

ROOT = Path(__file__).resolve().parent.parent
DEMO_REQUEST = ROOT / "sample_requests" / "vitamin_d3_softgel.json"


@dataclass(frozen=True)
class Measurement:
    name: str
    requests: int
    failures: int
    seconds: float
    latencies: list[float]

    @property
    def throughput(self) -> float:
        return self.requests / self.seconds if self.seconds > 0 else 0.0

    def percentile(self, q: float) -> float:
        return float(np.percentile(self.latencies, q)) if self.latencies else float("nan")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument(
        "--posts", type=int, default=240,
        help="POST /v1/analyses requests (enough that the first second, while the clients "
             "start and the server settles, does not decide the rate)")
    parser.add_argument("--health", type=int, default=2000, help="GET /healthz requests")
    parser.add_argument("--clients", type=int, default=8, help="concurrent client threads")
    parser.add_argument("--time-limit", type=float, default=180.0, help="seconds per phase")
    parser.add_argument("--workers", type=int, nargs="+", default=[1, 2],
                        help="service processes to measure, one run each (default: 1 and 2)")
    args = parser.parse_args(argv)
    failed = 0
    with StolenTime() as stolen:
        for workers in args.workers:
            failed += measure(args, workers)
    print(stolen.describe())
    return 1 if failed else 0


def measure(args: argparse.Namespace, workers: int) -> int:

    request = demo_request()
    body = json.dumps(request).encode("utf-8")
    subjects = len({r["subject"] for r in request["records"]})
    replicates = request.get("settings", {}).get("replicates", 10_000)
    print(f"\n=== {workers} worker(s); demo request: {subjects} subjects, "
          f"{len(request['records'])} rows, B = {replicates}")

    with tempfile.TemporaryDirectory(prefix="bioparity-bench-") as folder:
        port = free_port()
        base = f"http://127.0.0.1:{port}"
        server = start_server(port, Path(folder) / "archive.sqlite3", workers)
        try:
            wait_until_up(base, server)

            def post(client: httpx.Client) -> bool:
                response = client.post(
                    "/v1/analyses", content=body, headers={"Content-Type": "application/json"}
                )
                return response.status_code == 201

            def health(client: httpx.Client) -> bool:
                return client.get("/healthz").status_code == 200

            # While the analyses run, one probe checks that the event loop still answers
            # at once (the analysis runs in a worker thread).
            stop_probe = threading.Event()
            probe_latencies: list[float] = []
            probe = threading.Thread(
                target=probe_health, args=(base, stop_probe, probe_latencies), daemon=True
            )
            probe.start()
            analyses = run_phase("POST /v1/analyses", base, post, args.posts, args.clients,
                                 args.time_limit)
            stop_probe.set()
            probe.join(timeout=10)
            liveness = run_phase("GET /healthz", base, health, args.health, args.clients,
                                 args.time_limit)
            cpu_post, cpu_health = server_cpu_per_request(server, base, post, health)
        finally:
            stop_server(server)

    under_load = Measurement("GET /healthz (load)", len(probe_latencies), 0, analyses.seconds,
                             probe_latencies)
    print_table([analyses, liveness], args.clients, under_load)
    target = 0.06 if workers == 1 else 0.10
    if liveness.throughput > 0:
        print(f"POST / healthz throughput: {analyses.throughput / liveness.throughput:.3f} "
              f"(target >= {target:.2f} with {workers} worker(s)); POST p99 "
              f"{analyses.percentile(99) * 1e3:.0f} ms (target <= 250 ms), slowest "
              f"{max(analyses.latencies, default=float('nan')) * 1e3:.0f} ms (target < 2000 ms)")
    print(f"server CPU per request, one request at a time (every process and thread of the "
          f"service): POST {cpu_post * 1e3:.2f} ms, GET /healthz {cpu_health * 1e3:.2f} ms "
          f"(benchmarks/canonical.py splits a POST's record path from its statistics; the rest "
          f"is the HTTP layer)")
    return 0 if analyses.failures == 0 and liveness.failures == 0 else 1


SEQUENTIAL_POSTS = 60
SEQUENTIAL_HEALTH = 600


def server_cpu_per_request(
    server: subprocess.Popen[bytes], base: str, post: Callable[[httpx.Client], bool],
    health: Callable[[httpx.Client], bool],
) -> tuple[float, float]:
    """CPU seconds the service spends per POST and per GET /healthz, one request at a time, from
    the operating system's accounts of its processes (psutil), so the client's own work is not
    counted."""
    import psutil

    root = psutil.Process(server.pid)
    processes = [root, *root.children(recursive=True)]

    def cpu() -> float:
        return sum(sum(p.cpu_times()[:2]) for p in processes)

    spent = []
    with httpx.Client(base_url=base, timeout=60.0) as client:
        for send, count in ((post, SEQUENTIAL_POSTS), (health, SEQUENTIAL_HEALTH)):
            send(client)  # the connection open before the count starts
            start = cpu()
            for _ in range(count):
                if not send(client):
                    raise RuntimeError("a request failed while the server's CPU was counted")
            spent.append((cpu() - start) / count)
    return spent[0], spent[1]


def demo_request() -> dict[str, Any]:
    if DEMO_REQUEST.exists():
        loaded: dict[str, Any] = json.loads(DEMO_REQUEST.read_text(encoding="utf-8"))
        return loaded
    # Fallback: an equivalent seeded table (24 subjects, three periods, placebo arm).
    rng = np.random.default_rng(20261202)
    orders = [("PLACEBO", "CURRENT", "NEW"), ("CURRENT", "NEW", "PLACEBO"),
              ("NEW", "PLACEBO", "CURRENT")]
    means = {"PLACEBO": 4400.0, "CURRENT": 5300.0, "NEW": 5320.0}
    records = []
    for i in range(24):
        level = rng.normal(0.0, 400.0)
        for period, treatment in enumerate(orders[i % 3], start=1):
            records.append({
                "subject": f"V{i + 1:02d}", "period": period, "treatment": treatment,
                "value": round(float(means[treatment] + level + rng.normal(0.0, 120.0)), 1),
            })
    return {
        "design": {"test": "NEW", "reference": "CURRENT", "baseline": "PLACEBO"},
        "records": records,
        "settings": {"replicates": 10_000, "seed": 20261202},
    }


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        port: int = probe.getsockname()[1]
        return port


def start_server(port: int, database: Path, workers: int = 1) -> subprocess.Popen[bytes]:
    command = [sys.executable, "-m", "service", "serve", "--host", "127.0.0.1",
               "--port", str(port), "--db", str(database), "--workers", str(workers)]
    return subprocess.Popen(
        command, cwd=ROOT, env={**os.environ, "PYTHONUNBUFFERED": "1"},
        stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
    )


def wait_until_up(base: str, server: subprocess.Popen[bytes], timeout: float = 60.0) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if server.poll() is not None:
            error = server.stderr.read().decode(errors="replace") if server.stderr else ""
            raise RuntimeError(f"the server exited early:\n{error}")
        try:
            if httpx.get(f"{base}/healthz", timeout=1.0).status_code == 200:
                return
        except httpx.TransportError:
            pass
        time.sleep(0.2)
    raise RuntimeError(f"the server did not answer within {timeout:.0f} s")


def stop_server(server: subprocess.Popen[bytes]) -> None:
    server.terminate()
    try:
        server.wait(timeout=15)
    except subprocess.TimeoutExpired:
        server.kill()
        server.wait(timeout=5)


def run_phase(
    name: str,
    base: str,
    send: Callable[[httpx.Client], bool],
    total: int,
    clients: int,
    time_limit: float,
) -> Measurement:
    """`total` requests shared by `clients` threads; stops early at `time_limit` seconds."""
    lock = threading.Lock()
    remaining = [total]
    latencies: list[float] = []
    failures = [0]
    deadline = time.monotonic() + time_limit

    def worker() -> None:
        with httpx.Client(base_url=base, timeout=max(time_limit, 10.0)) as client:
            while time.monotonic() < deadline:
                with lock:
                    if remaining[0] <= 0:
                        return
                    remaining[0] -= 1
                started = time.perf_counter()
                try:
                    ok = send(client)
                except httpx.HTTPError:
                    ok = False
                elapsed = time.perf_counter() - started
                with lock:
                    latencies.append(elapsed)
                    failures[0] += 0 if ok else 1

    threads = [threading.Thread(target=worker, daemon=True) for _ in range(clients)]
    started = time.perf_counter()
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join(timeout=time_limit + 30)
    seconds = time.perf_counter() - started
    return Measurement(name, len(latencies), failures[0], seconds, latencies)


def probe_health(base: str, stop: threading.Event, latencies: list[float]) -> None:
    """GET /healthz every 50 ms until `stop` is set; one client, one request at a time."""
    with httpx.Client(base_url=base, timeout=10.0) as client:
        while not stop.wait(0.05):
            started = time.perf_counter()
            try:
                client.get("/healthz")
            except httpx.HTTPError:
                continue
            latencies.append(time.perf_counter() - started)


def print_table(rows: list[Measurement], clients: int, under_load: Measurement) -> None:
    print(f"\n{clients} concurrent clients, loopback\n")
    header = f"{'':20}{'requests':>10}{'failed':>8}{'seconds':>10}{'req/s':>10}" \
             f"{'p50 ms':>10}{'p99 ms':>10}"
    print(header)
    for row in rows:
        print(f"{row.name:20}{row.requests:>10}{row.failures:>8}{row.seconds:>10.2f}"
              f"{row.throughput:>10.1f}{row.percentile(50) * 1e3:>10.1f}"
              f"{row.percentile(99) * 1e3:>10.1f}")
    if under_load.latencies:
        print(f"{under_load.name:20}{under_load.requests:>10}{'':>8}{'':>10}{'':>10}"
              f"{under_load.percentile(50) * 1e3:>10.1f}{under_load.percentile(99) * 1e3:>10.1f}"
              "   (one probe every 50 ms while the analyses ran)")
    analyses, liveness = rows
    if analyses.throughput > 0 and analyses.latencies and liveness.latencies:
        print(f"\nliveness / analysis throughput: {liveness.throughput / analyses.throughput:.0f}x;"
              f" p50 latency ratio analysis / liveness: "
              f"{analyses.percentile(50) / liveness.percentile(50):.0f}x")


if __name__ == "__main__":
    sys.exit(main())
