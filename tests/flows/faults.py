"""Fault injection helpers: a TCP proxy that can go down, process trees, table states.

All traffic stays on 127.0.0.1 (the proxy listens there and forwards to the
local PostgreSQL server).
"""

from __future__ import annotations

import os
import socket
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager, suppress

import sqlalchemy as sa

from changekind.tasks import persist


class FlakyProxy:
    """Forwards 127.0.0.1:<port> to a server; :meth:`outage` takes it down for a while.

    During an outage every forwarded connection is cut and new ones are
    refused (nothing listens), as when a database server restarts.
    """

    def __init__(self, target: tuple[str, int]) -> None:
        self.target = target
        probe = socket.socket()
        probe.bind(("127.0.0.1", 0))
        self.port = probe.getsockname()[1]
        probe.close()
        self._lock = threading.Lock()
        self._conns: list[socket.socket] = []
        self._listener: socket.socket | None = None
        self._stopped = threading.Event()
        self.outages = 0
        self._listen()

    def _listen(self) -> None:
        listener = socket.socket()
        listener.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        listener.bind(("127.0.0.1", self.port))
        listener.listen(64)
        self._listener = listener
        threading.Thread(target=self._accept, args=(listener,), daemon=True).start()

    def _accept(self, listener: socket.socket) -> None:
        while not self._stopped.is_set():
            try:
                client, _ = listener.accept()
            except OSError:
                return  # closed: an outage or the end
            try:
                upstream = socket.create_connection(self.target, timeout=5)
            except OSError:
                client.close()
                continue
            upstream.settimeout(None)
            with self._lock:
                self._conns += [client, upstream]
            for a, b in ((client, upstream), (upstream, client)):
                threading.Thread(target=self._pump, args=(a, b), daemon=True).start()

    @staticmethod
    def _pump(src: socket.socket, dst: socket.socket) -> None:
        try:
            while data := src.recv(65536):
                dst.sendall(data)
        except OSError:
            pass
        finally:
            for s in (src, dst):
                with suppress(OSError):
                    s.shutdown(socket.SHUT_RDWR)

    def _cut(self) -> None:
        with self._lock:
            conns, self._conns = self._conns, []
        for s in conns:
            with suppress(OSError):
                s.shutdown(socket.SHUT_RDWR)
            s.close()

    def outage(self, seconds: float) -> None:
        """Refuse and cut every connection for ``seconds``, then serve again."""
        self.outages += 1
        assert self._listener is not None
        self._listener.close()
        self._cut()
        time.sleep(seconds)
        if not self._stopped.is_set():
            self._listen()

    def close(self) -> None:
        self._stopped.set()
        if self._listener is not None:
            self._listener.close()
        self._cut()


def via_proxy(url: str, port: int) -> str:
    """``url`` with its host and port replaced by the proxy's."""
    return sa.make_url(url).set(host="127.0.0.1", port=port).render_as_string(hide_password=False)


def terminate_backends(admin: sa.Engine, application_name: str) -> int:
    """``pg_terminate_backend`` on every connection of ``application_name``; how many."""
    with admin.connect() as conn:
        return int(
            conn.execute(
                sa.text(
                    "SELECT count(*) FILTER (WHERE pg_terminate_backend(pid)) "
                    "FROM pg_stat_activity WHERE application_name = :name "
                    "AND pid <> pg_backend_pid()"
                ),
                {"name": application_name},
            ).scalar()
        )


@contextmanager
def repeatedly(action, *, every: float, seconds: float) -> Iterator[list]:
    """Run ``action()`` every ``every`` seconds for ``seconds`` in a thread; yields its results."""
    results: list = []
    stop = threading.Event()

    def loop() -> None:
        end = time.monotonic() + seconds
        while not stop.is_set() and time.monotonic() < end:
            results.append(action())
            stop.wait(every)

    thread = threading.Thread(target=loop, daemon=True)
    thread.start()
    try:
        yield results
    finally:
        stop.set()
        thread.join(timeout=30)


def descendants(pid: int) -> dict[int, bytes]:
    """Processes below ``pid`` (from /proc): pid -> start time, to tell reused pids apart."""
    table: dict[int, tuple[int, bytes]] = {}
    for name in os.listdir("/proc"):
        if not name.isdigit():
            continue
        try:
            with open(f"/proc/{name}/stat", "rb") as f:
                rest = f.read().rsplit(b")", 1)[1].split()
        except (OSError, IndexError):
            continue
        table[int(name)] = (int(rest[1]), rest[19])
    out: dict[int, bytes] = {}
    todo = [pid]
    while todo:
        parent = todo.pop()
        for child, (ppid, start) in table.items():
            if ppid == parent and child not in out:
                out[child] = start
                todo.append(child)
    return out


def still_running(procs: dict[int, bytes]) -> list[int]:
    """Of ``procs`` (pid -> start time), those still running (zombies count as ended)."""
    alive = []
    for pid, start in procs.items():
        try:
            with open(f"/proc/{pid}/stat", "rb") as f:
                rest = f.read().rsplit(b")", 1)[1].split()
        except OSError:
            continue
        if rest[19] == start and rest[0] != b"Z":
            alive.append(pid)
    return alive


def good_state(db: str, series: set[str] | None = None) -> dict[str, list]:
    """Events (all, with their status) and models, optionally of some series only."""
    snap = persist.content_snapshot(db)

    def keep(rows):
        return [r for r in rows if series is None or r[0] in series]

    return {"events": keep(snap["series_events"]), "models": keep(snap["series_models"])}


def runs(db: str) -> list[dict]:
    with persist.connect(db).connect() as conn:
        return [dict(r._mapping) for r in conn.execute(persist.scan_runs.select())]


def problems(db: str) -> list[dict]:
    with persist.connect(db).connect() as conn:
        return [dict(r._mapping) for r in conn.execute(persist.source_problems.select())]


def subprocess_env(home) -> dict[str, str]:
    """The environment of a run in its own process: its own Prefect home, no server URL
    (an ephemeral server of its own, even when a Prefect server runs on 127.0.0.1:4200),
    quiet logs."""
    env = {
        **os.environ,
        "CHANGEKIND_LOCAL_PREFECT": "false",
        "PREFECT_HOME": str(home),
        "PREFECT_SERVER_ANALYTICS_ENABLED": "false",
        "PREFECT_LOGGING_LEVEL": "WARNING",
        "PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS": "180",
    }
    env.pop("PREFECT_API_URL", None)
    return env


def command_line(pid: int) -> str:
    """The command line of a process ('' when it has ended)."""
    try:
        with open(f"/proc/{pid}/cmdline", "rb") as f:
            return f.read().replace(b"\0", b" ").decode(errors="replace")
    except OSError:
        return ""
