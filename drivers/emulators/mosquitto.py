"""A real Mosquitto broker on 127.0.0.1, for the demo, tests and benchmarks.

``MosquittoBroker(workdir)`` writes its own configuration into ``workdir`` and runs
Debian's ``mosquitto`` in the foreground as a child process::

    with MosquittoBroker(tmp_path) as broker:
        ...  # broker.url == "mqtt://127.0.0.1:<port>"

The configuration follows shared/NOTES.md: one listener on loopback, anonymous
access or a password file made with ``mosquitto_passwd``, ``user root`` when run
as root (the broker would otherwise drop to ``mosquitto`` and lose access to
pytest's folders), ``max_queued_messages 0`` (the default of 1000 silently drops
QoS 1 messages for a slow subscriber), and persistence only when asked for.

:meth:`MosquittoBroker.stop` ends it politely (SIGTERM, which also writes the
persistence file), :meth:`MosquittoBroker.kill` abruptly (SIGKILL, nothing saved);
:meth:`MosquittoBroker.restart` starts it again on the same port. Readiness is a
TCP connect to the port within a deadline, not a line in the log (the broker
buffers its log when it goes to a file).
"""

from __future__ import annotations

import os
import shutil
import socket
import subprocess
import time
from collections.abc import Mapping, Sequence
from pathlib import Path
from types import TracebackType

HOST = "127.0.0.1"
#: Seconds to wait for the broker to accept a TCP connection after starting.
START_DEADLINE_S = 10.0
#: Seconds to wait for the broker to exit after SIGTERM before killing it.
STOP_DEADLINE_S = 5.0
# Seconds between connection attempts while waiting for the broker.
_POLL_S = 0.01
# Attempts with a fresh port when a port chosen by free_port() was taken meanwhile.
_PORT_ATTEMPTS = 3


def mosquitto_program() -> str | None:
    """Return the path of Debian's ``mosquitto`` (on PATH or in /usr/sbin), or None."""
    return shutil.which("mosquitto") or shutil.which("mosquitto", path="/usr/sbin:/sbin")


def free_port() -> int:
    """Return a TCP port on 127.0.0.1 that was free a moment ago (the OS's choice)."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind((HOST, 0))
        return int(sock.getsockname()[1])


def accepts(port: int) -> bool:
    """Return True when something accepts a TCP connection on 127.0.0.1:``port``."""
    try:
        with socket.create_connection((HOST, port), timeout=0.5):
            return True
    except OSError:
        return False


def end_process(process: subprocess.Popen[bytes] | None, *, kill: bool) -> None:
    """End a server's child process: SIGKILL when ``kill``, else SIGTERM and SIGKILL
    after ``STOP_DEADLINE_S``; nothing when it has ended already."""
    if process is None or process.poll() is not None:
        return
    if kill:
        process.kill()
        process.wait(timeout=STOP_DEADLINE_S)
        return
    process.terminate()
    try:
        process.wait(timeout=STOP_DEADLINE_S)
    except subprocess.TimeoutExpired:
        process.kill()
        process.wait(timeout=STOP_DEADLINE_S)


class MosquittoBroker:
    """A Mosquitto broker child process on 127.0.0.1, configured in ``workdir``.

    Options: ``port`` (TCP port; default a free one chosen at the first start and kept
    for restarts), ``users`` (user name -> password; when given, anonymous access is
    refused and a password file is written), ``persistence`` (keep sessions and
    queued messages in ``workdir`` across a stop and start; default off),
    ``extra_config`` (further configuration lines, appended verbatim).
    """

    def __init__(
        self,
        workdir: Path,
        port: int | None = None,
        users: Mapping[str, str] | None = None,
        persistence: bool = False,
        extra_config: Sequence[str] = (),
    ) -> None:
        self.workdir = Path(workdir)
        self.port = port
        self._port_fixed = port is not None
        self.users = dict(users or {})
        self.persistence = persistence
        self.extra_config = tuple(extra_config)
        self.config_path = self.workdir / "mosquitto.conf"
        self.log_path = self.workdir / "mosquitto.log"
        self.password_path = self.workdir / "passwords"
        self._process: subprocess.Popen[bytes] | None = None

    @property
    def url(self) -> str:
        """Return the broker's URL without credentials (``mqtt://127.0.0.1:PORT``)."""
        if self.port is None:
            raise RuntimeError("the broker has no port before its first start")
        return f"mqtt://{HOST}:{self.port}"

    @property
    def running(self) -> bool:
        """Return True while the broker process is alive."""
        return self._process is not None and self._process.poll() is None

    def log_text(self) -> str:
        """Return what the broker has logged so far (empty before the first start)."""
        try:
            return self.log_path.read_text(encoding="utf-8", errors="replace")
        except FileNotFoundError:
            return ""

    def _write_password_file(self) -> None:
        tool = shutil.which("mosquitto_passwd")
        if tool is None:
            raise RuntimeError("mosquitto_passwd not found (Debian package 'mosquitto')")
        self.password_path.unlink(missing_ok=True)
        for index, (user, password) in enumerate(self.users.items()):
            create = ["-c"] if index == 0 else []
            subprocess.run(
                [tool, *create, "-b", str(self.password_path), user, password],
                check=True,
                capture_output=True,
                timeout=10,
            )

    def _write_config(self) -> None:
        assert self.port is not None
        lines = [
            f"listener {self.port} {HOST}",
            "log_dest stdout",
            "log_type error",
            "log_type warning",
            "log_type notice",
            "log_type information",
            "max_queued_messages 0",
        ]
        if self.users:
            self._write_password_file()
            lines += ["allow_anonymous false", f"password_file {self.password_path}"]
        else:
            lines.append("allow_anonymous true")
        if self.persistence:
            lines += [
                "persistence true",
                f"persistence_location {self.workdir}/",
                "persistence_file mosquitto.db",
            ]
        else:
            lines.append("persistence false")
        if os.geteuid() == 0:
            lines.append("user root")
        lines += self.extra_config
        self.config_path.write_text("\n".join(lines) + "\n", encoding="utf-8")

    def _launch(self) -> bool:
        """Start the process and wait for its port; return False if it exited early."""
        assert self.port is not None
        self._write_config()
        with self.log_path.open("ab") as log:
            self._process = subprocess.Popen(
                [mosquitto_program() or "mosquitto", "-c", str(self.config_path)],
                stdin=subprocess.DEVNULL,
                stdout=log,
                stderr=subprocess.STDOUT,
            )
        deadline = time.monotonic() + START_DEADLINE_S
        while time.monotonic() < deadline:
            if self._process.poll() is not None:
                return False
            if accepts(self.port):
                return True
            time.sleep(_POLL_S)
        self._end(kill=True)
        raise RuntimeError(
            f"mosquitto did not accept connections on {HOST}:{self.port} within "
            f"{START_DEADLINE_S} s; log:\n{self.log_text()[-2000:]}"
        )

    def start(self) -> MosquittoBroker:
        """Start the broker and return self once it accepts TCP connections."""
        if self.running:
            raise RuntimeError("the broker is already running")
        self.workdir.mkdir(parents=True, exist_ok=True)
        attempts = 1 if self._port_fixed else _PORT_ATTEMPTS
        for _ in range(attempts):
            if not self._port_fixed:
                self.port = free_port()
            if self._launch():
                self._port_fixed = True  # restarts keep this port
                return self
            self._process = None
        raise RuntimeError(
            f"mosquitto exited at start (port {self.port}); log:\n{self.log_text()[-2000:]}"
        )

    def _end(self, *, kill: bool) -> None:
        process, self._process = self._process, None
        end_process(process, kill=kill)

    def stop(self) -> None:
        """Stop the broker politely (SIGTERM, then SIGKILL after a deadline); idempotent."""
        self._end(kill=False)

    def kill(self) -> None:
        """Kill the broker at once (SIGKILL): no goodbye to clients, nothing persisted."""
        self._end(kill=True)

    def restart(self) -> MosquittoBroker:
        """Stop the broker and start it again on the same port; return self."""
        self.stop()
        return self.start()

    def __enter__(self) -> MosquittoBroker:
        return self.start()

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.stop()
