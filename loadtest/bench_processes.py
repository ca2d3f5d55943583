"""The processes the service benchmark starts: its own redis-server and the service.

Both run on free loopback ports, write their logs to a folder, and are stopped by their own
process ids. CPU use is read from ``/proc/<pid>/stat`` (the service and every process under it)
and from Redis's ``INFO cpu``.
"""

from __future__ import annotations

import os
import secrets
import shutil
import signal
import socket
import subprocess
import sys
import time
import urllib.error
import urllib.request
from pathlib import Path
from typing import Any

READY_TIMEOUT_S = 60.0
CLK_TCK = os.sysconf("SC_CLK_TCK")


class BenchError(Exception):
    """The benchmark could not set itself up (printed without a traceback)."""


def load_average() -> str:
    """The 1-minute load average: other work on the machine skews every figure."""
    return f"{os.getloadavg()[0]:.1f}"


def machine_jiffies(stat: str | None = None) -> tuple[int, int] | None:
    """(stolen, total) CPU time of the whole machine so far, in clock ticks, from the ``cpu``
    line of ``/proc/stat`` (or of ``stat``); None where there is no such file.

    The fields are user, nice, system, idle, iowait, irq, softirq, steal, guest, guest_nice
    (proc(5)); guest time is already counted in user and nice, so the total is the first eight.
    Steal is the time a virtual machine was ready to run but the hypervisor ran another guest.

    >>> machine_jiffies("cpu  100 0 50 800 10 0 5 35 0 0")
    (35, 1000)
    """
    if stat is None:
        try:
            stat = Path("/proc/stat").read_text()
        except OSError:
            return None
    fields = stat.split("\n", 1)[0].split()
    if len(fields) < 9 or fields[0] != "cpu":
        return None
    ticks = [int(x) for x in fields[1:9]]
    return ticks[7], sum(ticks)


def steal_share(before: tuple[int, int] | None, after: tuple[int, int] | None) -> float | None:
    """Share of the machine's CPU time stolen by the hypervisor between two `machine_jiffies`.

    >>> steal_share((35, 1000), (135, 2000))
    0.1
    >>> steal_share(None, (1, 2)) is None
    True
    """
    if before is None or after is None or after[1] <= before[1]:
        return None
    return (after[0] - before[0]) / (after[1] - before[1])


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _stop(process: subprocess.Popen[bytes], group: bool) -> None:
    """Stop a child this script started: SIGTERM to its pid, then SIGKILL (its own group)."""
    if process.poll() is not None:
        return
    process.send_signal(signal.SIGTERM)
    try:
        process.wait(timeout=20)
    except subprocess.TimeoutExpired:
        if group:  # the service's session was created by this script for its workers
            os.killpg(process.pid, signal.SIGKILL)
        else:
            process.kill()
        process.wait(timeout=10)


class RedisProcess:
    """A redis-server of our own on a free port, no persistence, stopped by its pid."""

    def __init__(self, folder: Path) -> None:
        binary = shutil.which("redis-server")
        if binary is None:
            raise BenchError(
                "redis-server not found on PATH (Debian: apt-get install redis-server)"
            )
        self.port = free_port()
        self.url = f"redis://127.0.0.1:{self.port}/0"
        args = [
            binary, "--port", str(self.port), "--bind", "127.0.0.1", "--save", "",
            "--appendonly", "no", "--dir", str(folder), "--logfile", str(folder / "redis.log"),
        ]  # fmt: skip
        self.process = subprocess.Popen(args, stdout=subprocess.DEVNULL)

    def client(self) -> Any:
        import redis

        return redis.Redis(port=self.port, socket_timeout=5.0)

    def wait_ready(self) -> str:
        import redis

        deadline = time.monotonic() + READY_TIMEOUT_S
        while time.monotonic() < deadline:
            if self.process.poll() is not None:
                raise BenchError("redis-server exited at start (see its log)")
            try:
                with self.client() as c:
                    return str(c.info("server")["redis_version"])
            except redis.ConnectionError:
                time.sleep(0.05)
        raise BenchError("redis-server did not answer PING")

    def cpu_s(self) -> float:
        with self.client() as c:
            info = c.info("cpu")
        return float(info["used_cpu_sys"]) + float(info["used_cpu_user"])

    def stop(self) -> None:
        _stop(self.process, group=False)


class ServiceProcess:
    """``emberscore serve`` (or ``--factory``) on a free port, output to a log file."""

    def __init__(self, redis_url: str, folder: Path, workers: int, factory: str | None) -> None:
        self.port = free_port()
        self.base = f"http://127.0.0.1:{self.port}"
        self.log_path = folder / "service.log"
        env = {k: v for k, v in os.environ.items() if not k.startswith("EMBERSCORE_")}
        env.update(
            EMBERSCORE_MODE="development",
            EMBERSCORE_REDIS_URL=redis_url,
            EMBERSCORE_HASH_SECRET=secrets.token_hex(32),  # fresh: nothing links to other runs
            EMBERSCORE_REFERENCE_ENDPOINT="true",
            EMBERSCORE_METRICS_DIR=str(folder / "metrics"),
        )
        with self.log_path.open("wb") as log:
            self.process = subprocess.Popen(
                self._command(workers, factory), env=env, stdout=log, stderr=subprocess.STDOUT,
                start_new_session=True,
            )  # fmt: skip

    def _command(self, workers: int, factory: str | None) -> list[str]:
        host, port = "127.0.0.1", str(self.port)
        if factory is None:
            exe = Path(sys.executable).with_name("emberscore")
            cmd = [str(exe)] if exe.exists() else [sys.executable, "-m", "service.cli"]
            return [*cmd, "serve", "--host", host, "--port", port, "--workers", str(workers)]
        code = (
            "import sys, uvicorn; from service.workers.serve import server_options, "
            "prepare_metrics_dir; from service.config import Settings; "
            "prepare_metrics_dir(Settings(), int(sys.argv[3])); "
            "uvicorn.run(sys.argv[4], **server_options(sys.argv[1], int(sys.argv[2]), "
            "int(sys.argv[3])))"
        )
        return [sys.executable, "-c", code, host, port, str(workers), factory]

    def get(self, path: str) -> tuple[int, str]:
        try:
            with urllib.request.urlopen(self.base + path, timeout=5) as answer:
                return answer.status, answer.read().decode()
        except urllib.error.HTTPError as exc:
            return exc.code, exc.read().decode()

    def post(self, path: str, body: bytes) -> tuple[int, str]:
        request = urllib.request.Request(
            self.base + path, data=body, headers={"Content-Type": "application/json"}
        )
        try:
            with urllib.request.urlopen(request, timeout=5) as answer:
                return answer.status, answer.read().decode()
        except urllib.error.HTTPError as exc:
            return exc.code, exc.read().decode()

    def wait_ready(self) -> str:
        deadline = time.monotonic() + READY_TIMEOUT_S
        while time.monotonic() < deadline:
            if self.process.poll() is not None:
                raise BenchError(f"the service exited at start:\n{self.log_tail()}")
            try:
                status, text = self.get("/readyz")
                if status == 200:
                    return text
            except (urllib.error.URLError, ConnectionError, TimeoutError):
                pass
            time.sleep(0.2)
        raise BenchError(f"the service was not ready within {READY_TIMEOUT_S:.0f} s")

    def log_tail(self, lines: int = 15) -> str:
        return "\n".join(self.log_path.read_text(errors="replace").splitlines()[-lines:])

    def cpu_s(self) -> dict[int, float]:
        """CPU seconds (user + system) of the service and of every process under it, by pid."""
        return {pid: _proc_cpu_s(pid) for pid in _descendants(self.process.pid)}

    def stop(self) -> None:
        _stop(self.process, group=True)


def _descendants(root: int) -> list[int]:
    parents: dict[int, int] = {}
    for stat in Path("/proc").glob("[0-9]*/stat"):
        try:
            fields = stat.read_text().rsplit(")", 1)[1].split()
        except OSError:
            continue
        parents[int(stat.parent.name)] = int(fields[1])
    out, frontier = [root], [root]
    while frontier:
        frontier = [pid for pid, parent in parents.items() if parent in frontier]
        out += frontier
    return out


def _proc_cpu_s(pid: int) -> float:
    try:
        fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    except OSError:
        return 0.0
    return (int(fields[11]) + int(fields[12])) / CLK_TCK  # utime, stime (proc(5))
