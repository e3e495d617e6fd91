"""Which Prefect server a fleet command uses, and what it says while it waits.

flows/processes.py: a configured server (``PREFECT_API_URL``), else one running
on 127.0.0.1:4200 (asked with a short timeout), else a temporary one started for
the run; flows/cli/runs.py: on a terminal the spinner on stderr says what the
command waits for, and ``--json`` output on stdout stays pure JSON.

References
----------
- Prefect's own health endpoint contract (``GET /api/health`` answers ``true``),
  served here by a stand-in on a free port of 127.0.0.1 and, in the integration
  tests, by a real ``prefect server start``.
- The Prefect API itself (flow runs read back by id through its client): the run
  a command reports must be the one the server holds.
- Python's ``json`` parser for stdout.
"""

from __future__ import annotations

import http.server
import json
import os
import pty
import select
import socket
import subprocess
import sys
import threading
import time
from collections.abc import Iterator
from pathlib import Path

import pytest

from changekind.flows import processes
from changekind.flows.processes import PROBE_ENV, local_prefect_server, shared_prefect_server
from tests.flows.fleet import make_fleet, write_source


class _Health(http.server.BaseHTTPRequestHandler):
    answer = b"true"

    def do_GET(self) -> None:
        if self.path != "/api/health":
            self.send_error(404)
            return
        self.send_response(200)
        self.send_header("Content-Type", "application/json")
        self.end_headers()
        self.wfile.write(self.server.answer)  # type: ignore[attr-defined]

    def log_message(self, *_args) -> None:
        return


def _serve(answer: bytes) -> Iterator[str]:
    server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), _Health)
    server.answer = answer  # type: ignore[attr-defined]
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    try:
        yield f"http://127.0.0.1:{server.server_address[1]}/api"
    finally:
        server.shutdown()
        server.server_close()


@pytest.fixture
def healthy() -> Iterator[str]:
    yield from _serve(b"true")


@pytest.fixture
def unhealthy() -> Iterator[str]:
    yield from _serve(b"false")


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.mark.integration
def test_the_probe_finds_a_healthy_server_only(healthy, unhealthy, monkeypatch):
    monkeypatch.delenv(PROBE_ENV, raising=False)
    assert local_prefect_server(url=healthy) == healthy
    assert local_prefect_server(url=unhealthy) is None  # answers, but not healthy
    assert local_prefect_server(url=healthy.replace("/api", "/other")) is None  # 404
    closed = f"http://127.0.0.1:{_free_port()}/api"
    start = time.perf_counter()
    assert local_prefect_server(url=closed) is None
    assert time.perf_counter() - start < 2.0  # refused at once, not a long wait
    monkeypatch.setenv(PROBE_ENV, "false")
    assert local_prefect_server(url=healthy) is None  # never asked


@pytest.mark.integration
def test_a_proxy_setting_does_not_reroute_the_probe(healthy, monkeypatch):
    monkeypatch.delenv(PROBE_ENV, raising=False)
    monkeypatch.setenv("http_proxy", f"http://127.0.0.1:{_free_port()}")  # nothing listens
    monkeypatch.setenv("HTTP_PROXY", f"http://127.0.0.1:{_free_port()}")
    assert local_prefect_server(url=healthy) == healthy


@pytest.mark.integration
def test_a_running_local_server_is_used_for_the_run(healthy, monkeypatch):
    from prefect.settings import PREFECT_API_URL, get_current_settings, temporary_settings

    monkeypatch.setattr(
        processes, "local_prefect_server", lambda: local_prefect_server(url=healthy)
    )
    said: list[str] = []
    # No server configured (the session's test server, if any, set aside).
    with temporary_settings(restore_defaults={PREFECT_API_URL}):
        assert get_current_settings().api.url is None
        with shared_prefect_server(say=said.append) as url:
            assert url == healthy
            assert get_current_settings().api.url == healthy  # the run's settings point at it
        assert get_current_settings().api.url is None  # and only for the run
    assert said == [f"using the Prefect server running at {healthy}"]


# --------------------------------------------------------------------------- whole commands


@pytest.fixture(scope="module")
def small_source(tmp_path_factory) -> Path:
    data, _ = make_fleet(2, hours=120, seed=1)
    return write_source(data, tmp_path_factory.mktemp("server-source") / "source")


def _env(home: Path, **extra: str) -> dict[str, str]:
    env = {k: v for k, v in os.environ.items() if not k.startswith("PREFECT_")}
    env.update(PREFECT_HOME=str(home), COLUMNS="200", TERM="xterm", **extra)
    return env


def _scan_on_a_terminal(source: Path, db: str, env: dict[str, str]) -> tuple[int, str, str]:
    """``changekind scan --json`` with stderr on a pseudo-terminal and stdout on a pipe."""
    master, slave = pty.openpty()
    command = [sys.executable, "-m", "changekind.flows.cli", "scan", "--source", str(source)]
    proc = subprocess.Popen(
        [*command, "--db", db, "--json"],
        stdout=subprocess.PIPE,
        stderr=slave,
        stdin=subprocess.DEVNULL,
        env=env,
    )
    os.close(slave)
    seen = bytearray()
    deadline = time.monotonic() + 300
    while time.monotonic() < deadline:
        ready, _, _ = select.select([master], [], [], 0.5)
        if ready:
            try:
                chunk = os.read(master, 65536)
            except OSError:  # the child closed the terminal
                break
            if not chunk:
                break
            seen.extend(chunk)
        elif proc.poll() is not None:
            break
    out = proc.stdout.read().decode() if proc.stdout else ""
    code = proc.wait(timeout=60)
    os.close(master)
    return code, out, seen.decode(errors="replace")


@pytest.mark.integration
def test_on_a_terminal_the_command_says_it_starts_a_server_and_json_stays_clean(
    small_source, tmp_path
):
    env = _env(tmp_path / "home", CHANGEKIND_LOCAL_PREFECT="false")
    code, out, terminal = _scan_on_a_terminal(small_source, f"sqlite:///{tmp_path / 'x.db'}", env)
    assert code == 0, terminal[-3000:]
    summary = json.loads(out)  # stdout is the JSON summary and nothing else
    assert summary["kind"] == "scan" and summary["series_total"] == 2
    assert "starting a Prefect server for this run" in terminal
    assert "loading Prefect" in terminal
    assert "telemetry" not in terminal.lower() and "analytics" not in terminal.lower()
    assert "Traceback" not in terminal


def _port_4200_free() -> bool:
    with socket.socket() as s:
        try:
            s.bind(("127.0.0.1", 4200))
        except OSError:
            return False
    return True


@pytest.mark.integration
def test_a_prefect_server_running_on_4200_is_found_and_holds_the_run(small_source, tmp_path):
    if not _port_4200_free():
        pytest.skip("127.0.0.1:4200 is in use by another program on this machine")
    from tests.benchmarks.bench_fleet import stop_server

    home = tmp_path / "server-home"
    log = tmp_path / "server.log"
    prefect = str(Path(sys.executable).with_name("prefect"))
    server = subprocess.Popen(
        [prefect, "server", "start", "--host", "127.0.0.1", "--port", "4200"],
        env=_env(home, PREFECT_SERVER_ANALYTICS_ENABLED="false"),
        stdout=log.open("w"),
        stderr=subprocess.STDOUT,
        start_new_session=True,
    )
    try:
        deadline = time.monotonic() + 180
        while local_prefect_server(url="http://127.0.0.1:4200/api") is None:
            assert server.poll() is None, log.read_text()[-2000:]
            assert time.monotonic() < deadline, "the Prefect server did not start in 180 s"
            time.sleep(1)
        env = _env(tmp_path / "client-home")
        env.pop(PROBE_ENV, None)
        code, out, terminal = _scan_on_a_terminal(
            small_source, f"sqlite:///{tmp_path / 'x.db'}", env
        )
        assert code == 0, terminal[-3000:]
        run_id = json.loads(out)["run_id"]
        assert "using the Prefect server running at http://127.0.0.1:4200/api" in terminal
        assert "starting a Prefect server" not in terminal
        # Reference: the server's own record of the flow run.
        check = (
            "from prefect.client.orchestration import get_client\n"
            "import sys\n"
            "with get_client(sync_client=True) as c:\n"
            "    run = c.read_flow_run(sys.argv[1])\n"
            "print(run.state_type.value, run.name and 'named')\n"
        )
        done = subprocess.run(
            [sys.executable, "-c", check, run_id],
            env={**_env(tmp_path / "reader-home"), "PREFECT_API_URL": "http://127.0.0.1:4200/api"},
            capture_output=True,
            text=True,
            timeout=120,
            check=False,
        )
        assert done.returncode == 0, done.stderr[-2000:]
        assert done.stdout.split() == ["COMPLETED", "named"]
    finally:
        stop_server(server)
