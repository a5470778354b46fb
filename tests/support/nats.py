"""Real ``nats-server`` processes on 127.0.0.1 for tests and benchmarks: one, or a cluster.

``NatsCluster(workdir, nodes=3, layout=EngineLayout(...))`` writes one configuration per
node into ``workdir`` (its own client port, MQTT port, cluster port and JetStream
folder; routes to the others; the engine's subject mapping) and runs Debian's
``nats-server`` for each, as a child process::

    with NatsCluster(tmp_path, nodes=3, layout=layout) as cluster:
        cluster.urls        # ["nats://127.0.0.1:PORT", ...]
        cluster.mqtt_ports  # where MQTT instruments publish
        cluster.kill(1)     # SIGKILL one node

Readiness is a TCP connect to each node's client and MQTT ports (shared/NOTES.md);
a cluster is ready for JetStream once its meta leader is elected, which
:meth:`NatsCluster.start` leaves to the client (a worker retries its set-up).
"""

from __future__ import annotations

import subprocess
import time
from pathlib import Path
from types import TracebackType

from drivers.emulators.mosquitto import HOST, accepts, end_process, free_port
from monitor.engine.partition import EngineLayout

#: Seconds to wait for a node to accept TCP connections.
START_DEADLINE_S = 15.0


class NatsCluster:
    """``nodes`` nats-server processes on 127.0.0.1 with JetStream, MQTT and, when
    there are several, cluster routes between them."""

    def __init__(self, workdir: Path, nodes: int = 3, layout: EngineLayout | None = None,
                 extra: str = "") -> None:  # fmt: skip
        self.workdir = Path(workdir)
        self.nodes = nodes
        self.layout = layout or EngineLayout()
        self.extra = extra  # more configuration for every node (TLS, authorization)
        self.ports = [free_port() for _ in range(nodes)]
        self.mqtt_ports = [free_port() for _ in range(nodes)]
        self.cluster_ports = [free_port() for _ in range(nodes)]
        self._processes: list[subprocess.Popen[bytes] | None] = [None] * nodes

    @property
    def urls(self) -> list[str]:
        """Return every node's client URL."""
        return [f"nats://{HOST}:{port}" for port in self.ports]

    def _config(self, index: int) -> Path:
        node = self.workdir / f"node{index}"
        (node / "js").mkdir(parents=True, exist_ok=True)
        lines = [
            f'server_name: "n{index}"',
            f"listen: {HOST}:{self.ports[index]}",
            f'jetstream {{ store_dir: "{node / "js"}" }}',
            # the MQTT listener keeps its sessions and QoS 1 state in streams of its own:
            # with two replicas (its default here) one node lost leaves them no leader
            f"mqtt {{ listen: {HOST}:{self.mqtt_ports[index]}"
            + (f", stream_replicas: {min(self.nodes, 3)}" if self.nodes > 1 else "")
            + " }",
            self.layout.server_config(),
            self.extra,
        ]
        if self.nodes > 1:
            routes = ", ".join(
                f"nats-route://{HOST}:{port}"
                for i, port in enumerate(self.cluster_ports)
                if i != index
            )
            lines.append(
                f'cluster {{ name: "ebullio-test", listen: {HOST}:{self.cluster_ports[index]}, '
                f"routes: [{routes}] }}"
            )
        path = node / "nats.conf"
        path.write_text("\n".join(lines) + "\n", encoding="utf-8")
        return path

    def log_text(self, index: int) -> str:
        """Return what node ``index`` has logged."""
        try:
            return (self.workdir / f"node{index}" / "nats.log").read_text(errors="replace")
        except FileNotFoundError:
            return ""

    def start_node(self, index: int) -> None:
        """Start node ``index`` (again) and wait until it accepts TCP connections."""
        config = self._config(index)
        with (self.workdir / f"node{index}" / "nats.log").open("ab") as log:
            self._processes[index] = subprocess.Popen(
                ["nats-server", "-c", str(config)],
                stdin=subprocess.DEVNULL,
                stdout=log,
                stderr=subprocess.STDOUT,
            )
        deadline = time.monotonic() + START_DEADLINE_S
        process = self._processes[index]
        assert process is not None
        while time.monotonic() < deadline:
            if process.poll() is not None:
                raise RuntimeError(f"nats-server n{index} exited:\n{self.log_text(index)[-2000:]}")
            if accepts(self.ports[index]) and accepts(self.mqtt_ports[index]):
                return
            time.sleep(0.02)
        self.kill(index)
        raise RuntimeError(f"nats-server n{index} did not start:\n{self.log_text(index)[-2000:]}")

    def start(self) -> NatsCluster:
        """Start every node; return self."""
        self.workdir.mkdir(parents=True, exist_ok=True)
        for index in range(self.nodes):
            self.start_node(index)
        return self

    def pid(self, index: int) -> int:
        """Return node ``index``'s process id (it must be running)."""
        process = self._processes[index]
        if process is None:
            raise RuntimeError(f"node n{index} is not running")
        return process.pid

    def kill(self, index: int) -> None:
        """Kill node ``index`` at once (SIGKILL)."""
        process, self._processes[index] = self._processes[index], None
        end_process(process, kill=True)

    def stop(self) -> None:
        """Stop every node politely (SIGTERM, then SIGKILL after a deadline)."""
        for index, process in enumerate(self._processes):
            self._processes[index] = None
            end_process(process, kill=False)

    def __enter__(self) -> NatsCluster:
        return self.start()

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.stop()


def make_certificates(folder: Path) -> tuple[Path, Path, Path]:
    """Make a certificate authority of our own and a server certificate it signed for
    127.0.0.1 (the ``openssl`` command, Debian's); return (CA, certificate, key) files."""
    folder.mkdir(parents=True, exist_ok=True)
    ca_key, ca, key, request, cert = (folder / n for n in (
        "ca.key", "ca.pem", "server.key", "server.csr", "server.pem"))  # fmt: skip
    extensions = folder / "server.ext"
    extensions.write_text("subjectAltName = IP:127.0.0.1\n", encoding="utf-8")
    steps = [
        ["req", "-x509", "-newkey", "rsa:2048", "-nodes", "-keyout", ca_key, "-out", ca,
         "-days", "2", "-subj", "/CN=ebullio test authority"],
        ["req", "-newkey", "rsa:2048", "-nodes", "-keyout", key, "-out", request,
         "-subj", "/CN=127.0.0.1"],
        ["x509", "-req", "-in", request, "-CA", ca, "-CAkey", ca_key, "-CAcreateserial",
         "-out", cert, "-days", "2", "-extfile", extensions],
    ]  # fmt: skip
    for step in steps:
        subprocess.run(["openssl", *map(str, step)], check=True, capture_output=True,
                       timeout=60)  # fmt: skip
    return ca, cert, key
