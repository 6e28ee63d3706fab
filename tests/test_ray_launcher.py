"""A sweep on a real Ray cluster through ``hydra/launcher=ray_cluster`` (hydra's Ray launcher plugin).

The test starts a one-node Ray cluster of its own (``ray start --head``) on the loopback interface,
with every port chosen here, the dashboard off and a small object store, and stops it, and only
it, at the end. The same tiny sweep then runs on Ray workers and serially on this process's
machine: the run folders and their numbers must agree, and a re-run must skip the finished runs.
"""

from __future__ import annotations

import os
import re
import subprocess
import sys
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

from loopback import LOOPBACK, free_ports, stop_session, wait_for
from runtools import TINY, measured, shell

RAY = str(Path(sys.executable).parent / "ray")
#: ray start options that take a port, one each; the two metrics exporters are set through the environment
SERVICE_PORTS = ("port", "node-manager-port", "object-manager-port", "ray-client-server-port", "dashboard-port",
                 "dashboard-agent-listen-port", "dashboard-agent-grpc-port", "runtime-env-agent-port",
                 "metrics-export-port")
WORKER_PORTS = 24
NUM_CPUS = 2  # this machine's cores: two runs at a time
#: Ray's multi-node mode off: Ray then keeps 127.0.0.1 as this node's address (instead of resolving it to
#: the machine's network address) and binds its servers there, on loopback only
LOOPBACK_ONLY = {"RAY_ENABLE_WINDOWS_OR_OSX_CLUSTER": "0", "RAY_USAGE_STATS_ENABLED": "0"}


@dataclass
class RayHead:
    """A running one-node cluster: its GCS address, its temp folder (logs) and its ``ray start`` process."""

    address: str
    temp_dir: Path
    leader: subprocess.Popen

    def worker_output(self) -> str:
        """Everything the cluster's worker processes wrote to stderr (Ray keeps it per worker)."""
        logs = sorted((self.temp_dir / "session_latest" / "logs").glob("worker-*.err"))
        return "".join(p.read_text(errors="replace") for p in logs)


@contextmanager
def ray_head() -> Iterator[RayHead]:
    """Start ``ray start --head --block`` on loopback in its own session; stop that session on the way out."""
    ports = free_ports(len(SERVICE_PORTS) + 2 + WORKER_PORTS)
    service, exporters, workers = ports[: len(SERVICE_PORTS)], ports[len(SERVICE_PORTS):][:2], ports[-WORKER_PORTS:]
    env = {**os.environ, **LOOPBACK_ONLY,
           "AUTOSCALER_METRIC_PORT": str(exporters[0]), "DASHBOARD_METRIC_PORT": str(exporters[1])}
    # in /tmp, not in pytest's tmp_path: Ray's socket paths under it must fit in 107 bytes
    with tempfile.TemporaryDirectory(prefix="qlab-ray-", ignore_cleanup_errors=True) as temp:
        temp_dir = Path(temp)
        args = [RAY, "start", "--head", "--block", f"--node-ip-address={LOOPBACK}",
                *(f"--{name}={port}" for name, port in zip(SERVICE_PORTS, service, strict=True)),
                f"--min-worker-port={workers[0]}", f"--max-worker-port={workers[-1]}",
                "--include-dashboard=false", f"--object-store-memory={80 * 2**20}", f"--num-cpus={NUM_CPUS}",
                f"--temp-dir={temp_dir}", "--disable-usage-stats"]
        log = temp_dir / "ray_start.log"
        with log.open("w") as out:
            leader = subprocess.Popen(args, stdout=out, stderr=subprocess.STDOUT, env=env, start_new_session=True)
        try:
            wait_for(lambda: leader.poll() is not None or "Ray runtime started" in log.read_text(), 120, "ray start")
            if leader.poll() is not None:
                raise RuntimeError(f"ray start exited with {leader.returncode}:\n{log.read_text()}")
            yield RayHead(f"{LOOPBACK}:{service[0]}", temp_dir, leader)
        finally:
            stop_session(leader, grace_s=30)


def run_folders(series: Path) -> dict[str, Path]:
    """A series' run folders by name (hydra's own folders left out)."""
    return {p.name: p for p in series.iterdir() if not p.name.startswith(".")}


def skip_lines(text: str, name: str) -> int:
    """How many closing lines in ``text`` say that run ``name`` was skipped as already finished."""
    return len(re.findall(rf"^{re.escape(name)}: already finished", text, flags=re.MULTILINE))


def test_ray_cluster_sweep_matches_the_serial_sweep_and_skips_finished_runs(tmp_path, monkeypatch):
    monkeypatch.setenv("RAY_ENABLE_WINDOWS_OR_OSX_CLUSTER", "0")  # the driver (qlab-run) joins on loopback too
    monkeypatch.setenv("RAY_DEDUP_LOGS", "0")  # forward every worker line, even near-duplicates
    sweep = ["-m", "learner=tabular,linear", "seed=0,1", f"results_dir={tmp_path}", *TINY]
    shell([*sweep, "series_name=serial"], tmp_path)
    with ray_head() as head:
        on_ray = [*sweep, "series_name=on_ray", "hydra/launcher=ray_cluster",
                  f"hydra.launcher.ray.init.address={head.address}"]
        first = shell(on_ray, tmp_path)
        assert "Connected to Ray cluster" in first.stderr and "(_run_job pid=" in first.stderr
        runs, serial = run_folders(tmp_path / "on_ray"), run_folders(tmp_path / "serial")
        assert len(runs) == 4 and sorted(runs) == sorted(serial)
        ran = head.worker_output()
        for name, run in runs.items():
            assert (run / "FINISHED").is_file()
            assert f"{name}: success" in ran and skip_lines(ran, name) == 0  # trained on a Ray worker
            assert measured(run) and measured(run) == measured(serial[name])
        tables = {name: ((run / "metrics.csv").read_bytes(), (run / "metrics.csv").stat().st_mtime_ns)
                  for name, run in runs.items()}

        again = shell(on_ray, tmp_path)
        assert "already finished" in again.stderr  # forwarded from the workers to the driver's stderr
        ran = head.worker_output()  # all of it, whatever Ray forwarded before the driver left
        for name, run in runs.items():
            assert skip_lines(ran, name) == 1
            assert ((run / "metrics.csv").read_bytes(), (run / "metrics.csv").stat().st_mtime_ns) == tables[name]
