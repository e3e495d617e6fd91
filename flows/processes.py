"""No process outlives its run: child processes end with the process that started them.

A fleet run starts processes of its own: Prefect's throw-away API server (when
no server is configured), and with ``--runner processes`` the worker processes
and multiprocessing's resource tracker.  Killed with SIGKILL, a process cannot
clean up, and these children used to stay behind (measured: the server in 4 of
4 kills, the workers and their tracker with ``--runner processes``).  Two
guards:

- :func:`die_with_parent`, the worker processes' initializer: Linux's
  ``PR_SET_PDEATHSIG`` makes the kernel send the worker SIGKILL when the
  process that started it ends, however it ends.
- :func:`stop_children_with_this_process`: a small watchdog process (its own
  session, so a signal to the run's process group does not reach it) notes
  the run's descendants every ``WATCH_SECONDS``; when the run's process is
  gone it sends them SIGTERM, then SIGKILL to any left after
  ``GRACE_SECONDS``.  It covers children started by libraries (Prefect's
  server), which no initializer reaches.

And one server for all: :func:`shared_prefect_server` uses the Prefect server
that is configured (``PREFECT_API_URL``) or already running on this machine
(:func:`local_prefect_server`: 127.0.0.1:4200 only, asked with a short
timeout), else starts the throw-away API server once in the run's process;
either way the run's settings point at it, so worker processes use it
instead of each starting a server of its own.
"""

from __future__ import annotations

import contextlib
import ctypes
import os
import signal
import subprocess
import sys
import urllib.error
import urllib.request
from collections.abc import Callable, Iterator

WATCH_SECONDS = 0.5
"""How often the watchdog notes the run's descendants."""
GRACE_SECONDS = 3.0
"""How long the watchdog waits after SIGTERM before SIGKILL."""

LOCAL_PREFECT_API = "http://127.0.0.1:4200/api"
"""Where ``prefect server start`` listens by default; the only address probed."""
PROBE_SECONDS = 0.5
"""How long the probe waits for a local Prefect server's health answer."""
PROBE_ENV = "CHANGEKIND_LOCAL_PREFECT"
"""Set to ``false`` (or ``0``/``no``/``off``) to never look for a local Prefect server."""

_PR_SET_PDEATHSIG = 1

_WATCHDOG = r"""
import os, signal, sys, time
parent, me, every, grace = int(sys.argv[1]), os.getpid(), float(sys.argv[2]), float(sys.argv[3])
signal.signal(signal.SIGINT, signal.SIG_IGN)
signal.signal(signal.SIGTERM, lambda *_: os._exit(0))

def table():
    out = {}
    for name in os.listdir("/proc"):
        if not name.isdigit():
            continue
        try:
            with open("/proc/" + name + "/stat", "rb") as f:
                rest = f.read().rsplit(b")", 1)[1].split()
        except (OSError, IndexError):
            continue
        out[int(name)] = (int(rest[1]), rest[19], rest[0])
    return out

known = {}
while os.getppid() == parent:
    now = table()
    children = {}
    for pid, (ppid, _, _) in now.items():
        children.setdefault(ppid, []).append(pid)
    todo = [parent]
    while todo:
        for child in children.get(todo.pop(), ()):
            if child != me and child not in known:
                known[child] = now[child][1]
                todo.append(child)
    known = {p: s for p, s in known.items() if p in now and now[p][1] == s}
    time.sleep(every)

def left():
    now = table()
    return [p for p, s in known.items() if p in now and now[p][1] == s and now[p][2] != b"Z"]

for sig, wait in ((signal.SIGTERM, grace), (signal.SIGKILL, 1.0)):
    for pid in left():
        try:
            os.kill(pid, sig)
        except OSError:
            pass
    end = time.monotonic() + wait
    while left() and time.monotonic() < end:
        time.sleep(0.1)
"""


def die_with_parent() -> None:
    """Ask the kernel to SIGKILL this process when its parent ends (Linux; else nothing).

    Used as the initializer of worker processes.
    """
    if not sys.platform.startswith("linux"):
        return
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        libc.prctl(_PR_SET_PDEATHSIG, signal.SIGKILL, 0, 0, 0)
    except (OSError, AttributeError):
        return
    if os.getppid() == 1:  # the parent ended before the request took effect
        os._exit(1)


@contextlib.contextmanager
def stop_children_with_this_process() -> Iterator[None]:
    """While the block runs, the run's descendants are ended if this process is killed.

    Nothing happens on systems without ``/proc``.  Ending the block normally
    stops the watchdog and leaves every child alone.
    """
    if not os.path.isdir("/proc/self"):
        yield
        return
    watchdog = subprocess.Popen(
        [
            sys.executable,
            "-I",
            "-S",
            "-c",
            _WATCHDOG,
            str(os.getpid()),
            str(WATCH_SECONDS),
            str(GRACE_SECONDS),
        ],
        stdin=subprocess.DEVNULL,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
        start_new_session=True,
        close_fds=True,
    )
    try:
        yield
    finally:
        watchdog.terminate()
        try:
            watchdog.wait(timeout=5)
        except subprocess.TimeoutExpired:
            watchdog.kill()
            watchdog.wait()


def local_prefect_server(
    *, url: str = LOCAL_PREFECT_API, timeout: float = PROBE_SECONDS
) -> str | None:
    """The API URL of a Prefect server answering on this machine, or None.

    Asks ``url``'s health endpoint (``/health`` under the API, which answers
    ``true``) directly, never through a proxy, waiting at most ``timeout``
    seconds.  Nothing is asked when :data:`PROBE_ENV` says ``false``.
    """
    if os.environ.get(PROBE_ENV, "").strip().lower() in ("false", "0", "no", "off"):
        return None
    direct = urllib.request.build_opener(urllib.request.ProxyHandler({}))
    try:
        with direct.open(url.rstrip("/") + "/health", timeout=timeout) as answer:
            body = answer.read(64).decode("ascii", "replace").strip()
    except (OSError, urllib.error.URLError, ValueError):
        return None
    return url if body == "true" else None


Say = Callable[[str], None]


@contextlib.contextmanager
def shared_prefect_server(say: Say | None = None) -> Iterator[str | None]:
    """One Prefect API for the run's process and its workers; yields its URL.

    1. With ``PREFECT_API_URL`` set (a real server, or the test harness)
       nothing changes.
    2. Else a Prefect server already running on this machine
       (:func:`local_prefect_server`) is used for the run.
    3. Else Prefect's throw-away server is started here once.

    In cases 2 and 3 the run's settings point at the server: worker
    processes get the settings in their environment and use this server
    instead of each starting their own.  ``say`` is told, in a few words,
    what the run is waiting for (the CLI shows it on a terminal).
    """
    # Deliberately here: the CLI imports this module and loads Prefect only for a run.
    from prefect.settings import PREFECT_API_URL, get_current_settings, temporary_settings

    tell = say or (lambda _: None)
    configured = get_current_settings().api.url
    if configured:
        tell(f"connecting to the Prefect server at {configured}")
        yield configured
        return
    found = local_prefect_server()
    if found is not None:
        tell(f"using the Prefect server running at {found}")
        with temporary_settings(updates={PREFECT_API_URL: found}):
            yield found
        return
    from prefect.server.api.server import SubprocessASGIServer

    tell("starting a Prefect server for this run…")
    server = SubprocessASGIServer()
    server.start()
    tell("starting the flow")
    with temporary_settings(updates={PREFECT_API_URL: server.api_url}):
        yield server.api_url
