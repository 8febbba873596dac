"""Start and stop real `python -m service serve` processes on 127.0.0.1 for the system tests.

Every server runs in a process group of its own (uvicorn's supervisor and its workers), so one
killpg stops all of it; every wait is bounded.
"""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import httpx
import numpy as np

ROOT = Path(__file__).resolve().parents[2]
STARTUP_SECONDS = 60.0

SEQUENCES = {"TRB": ("T", "R", "B"), "RBT": ("R", "B", "T"), "BTR": ("B", "T", "R")}
MEANS = {"B": 40.0, "R": 70.0, "T": 72.0}


def small_request(seed: int, subjects: int = 6, replicates: int = 100) -> dict[str, Any]:
    """A constructed three-period crossover with seeded normal values (cheap to analyse)."""
    rng = np.random.default_rng(seed)
    labels = list(SEQUENCES)
    rows: list[dict[str, Any]] = []
    for i in range(subjects):
        sequence = labels[i % len(labels)]
        level = float(rng.normal(0.0, 5.0))
        for period, treatment in enumerate(SEQUENCES[sequence], start=1):
            rows.append({
                "subject": f"P{i + 1:02d}", "period": period, "sequence": sequence,
                "treatment": treatment, "metric": "AUC",
                "value": round(MEANS[treatment] + level + float(rng.normal(0.0, 2.0)), 3),
            })
    return {
        "design": {"test": "T", "reference": "R", "baseline": "B"},
        "records": rows,
        "settings": {"replicates": replicates, "seed": seed},
    }


def free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        port: int = sock.getsockname()[1]
    return port


@dataclass
class Server:
    process: subprocess.Popen[bytes]
    base_url: str
    log: Path

    def kill(self, sig: int = signal.SIGKILL) -> None:
        """Signal the whole process group (supervisor and workers) and wait for the leader."""
        try:
            os.killpg(self.process.pid, sig)
        except ProcessLookupError:
            pass
        try:
            self.process.wait(timeout=30)
        except subprocess.TimeoutExpired:
            os.killpg(self.process.pid, signal.SIGKILL)
            self.process.wait(timeout=30)
        # Workers may outlive the leader for a moment; wait until the group is empty.
        deadline = time.monotonic() + 30
        while time.monotonic() < deadline:
            try:
                os.killpg(self.process.pid, 0)
            except ProcessLookupError:
                return
            time.sleep(0.05)

    def log_text(self) -> str:
        return self.log.read_text(errors="replace") if self.log.exists() else ""


def start_server(database_url: str, log: Path, *, workers: int = 1) -> Server:
    """`python -m service serve` on a free loopback port; returns once /healthz answers."""
    port = free_port()
    env = {k: v for k, v in os.environ.items() if not k.startswith("BIOPARITY_")}
    command = [
        sys.executable, "-m", "service", "serve", "--host", "127.0.0.1", "--port", str(port),
        "--db", database_url, "--workers", str(workers),
    ]
    with log.open("ab") as out:
        process = subprocess.Popen(
            command, cwd=ROOT, env=env, stdout=out, stderr=subprocess.STDOUT,
            stdin=subprocess.DEVNULL, start_new_session=True,
        )
    server = Server(process, f"http://127.0.0.1:{port}", log)
    deadline = time.monotonic() + STARTUP_SECONDS
    try:
        while time.monotonic() < deadline:
            if process.poll() is not None:
                raise RuntimeError(f"the server exited with {process.returncode}:\n{server.log_text()}")
            try:
                if httpx.get(server.base_url + "/healthz", timeout=1.0).status_code == 200:
                    return server
            except httpx.HTTPError:
                pass
            time.sleep(0.1)
        raise RuntimeError(f"the server did not answer within {STARTUP_SECONDS} s:\n{server.log_text()}")
    except BaseException:
        server.kill()
        raise
