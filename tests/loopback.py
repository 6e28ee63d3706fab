"""Servers the tests start on this machine: free loopback ports, bounded waits, stopping what was started.

A server is started as the leader of a new session (``start_new_session=True``), so its helpers
(Ray's raylet and workers, tensorboard's data server) share its process group and are stopped
with it, and nothing else on the machine is touched.
"""

from __future__ import annotations

import contextlib
import json
import os
import signal
import socket
import subprocess
import time
import urllib.request
from collections.abc import Callable
from typing import Any

LOOPBACK = "127.0.0.1"
PORT_SCAN = range(20_000, 32_000)  # below Linux's ephemeral range, where outgoing connections take ports


def free_ports(count: int) -> list[int]:
    """``count`` consecutive loopback ports that are free now: the first block found scanning ``PORT_SCAN``."""
    for base in range(PORT_SCAN.start, PORT_SCAN.stop - count, count):
        with contextlib.ExitStack() as held:
            try:
                for port in range(base, base + count):
                    held.enter_context(socket.socket(socket.AF_INET, socket.SOCK_STREAM)).bind((LOOPBACK, port))
            except OSError:
                continue
        return list(range(base, base + count))
    raise RuntimeError(f"no {count} consecutive free loopback ports in {PORT_SCAN}")


def wait_for(ready: Callable[[], Any], timeout_s: float, what: str, every_s: float = 0.5) -> Any:
    """Poll ``ready()`` until it returns something truthy (returned); ``TimeoutError`` after ``timeout_s``."""
    deadline = time.monotonic() + timeout_s
    while True:
        outcome = ready()
        if outcome:
            return outcome
        if time.monotonic() > deadline:
            raise TimeoutError(f"{what}: not ready after {timeout_s:.0f} s")
        time.sleep(every_s)


def stop_session(leader: subprocess.Popen, grace_s: float) -> None:
    """SIGTERM the session leader and give it ``grace_s`` to stop its helpers; SIGKILL what is left of its
    process group, then wait (bounded) until no process of the group is left, else ``TimeoutError``."""
    if leader.poll() is None:
        leader.terminate()
        with contextlib.suppress(subprocess.TimeoutExpired):
            leader.wait(timeout=grace_s)
    with contextlib.suppress(ProcessLookupError):
        os.killpg(leader.pid, signal.SIGKILL)
    leader.wait(timeout=grace_s)
    wait_for(lambda: not session_alive(leader), grace_s, f"process group {leader.pid} to end", every_s=0.1)


def session_alive(leader: subprocess.Popen) -> bool:
    """Whether any process of the leader's process group is still running (the leader itself reaped)."""
    try:
        os.killpg(leader.pid, 0)
    except ProcessLookupError:
        return False
    return True


def http_json(url: str, body: dict | None = None, timeout_s: float = 30) -> Any:
    """GET ``url`` (or POST ``body`` as JSON) and decode the JSON answer."""
    data = None if body is None else json.dumps(body).encode()
    request = urllib.request.Request(url, data=data, headers={"Content-Type": "application/json"})
    with urllib.request.urlopen(request, timeout=timeout_s) as answer:
        return json.loads(answer.read())
