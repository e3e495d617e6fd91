"""Fleet speed and memory: a warm hourly scan of many series, and a month's backfill.

Run by hand (not collected by pytest), under ``timeout``::

    timeout 3h .venv/bin/python -m tests.benchmarks.bench_fleet            # full size
    .venv/bin/python -m tests.benchmarks.bench_fleet --series 300 --cold-series 40 \\
        --backfill-series 60 --backfill-days 7                              # a quick run

What it does (all data invented: minute and hourly latency-like AR(1) series
of an imaginary fleet of edge nodes, with level shifts and spikes injected):

1. **warm scan** (``--series`` N, default 10,000): writes ``--history`` points
   per minute-level series (default 480) as a Parquet dataset, fits every
   model with a real cold ``scan_flow`` (timed), appends ``--new`` points per
   series (default 60, some with new events) and times the warm ``scan_flow``
   end to end once per ``--runners`` entry, each on a copy of the same
   post-cold database;
2. **cold reference** (``--cold-series``, default 500, ``--cold-history``
   1,440 points): a cold scan on a day of minute data, for the per-series cold
   cost at the history length a production model would be fitted on;
3. **backfill** (``--backfill-series`` 1,000 hourly series, ``--backfill-days``
   30): ``backfill_flow`` over the span with a 7-day warm-up and 7-day chunks.

Every flow runs in a fresh child process (``python -m ... run-flow``) against
a Prefect server started here (``prefect server start``, SQLite-backed, in the
work directory, or on ``--server-database``, e.g. PostgreSQL) unless
``--api-url`` names one, so a run pays what a worker's flow run pays:
interpreter start, imports, flow-run creation, the task runner.  CPU seconds
are reported for the flow process, its task workers, the Prefect server and
the rest of the machine (other load), as per-series CPU is less sensitive to
that load than wall time.  After the warm scans, ``--profile-sample`` series
are analysed again without Prefect in this process, split by outcome (warm or
refitted) and, for the warm ones, by stage under cProfile.
Peak memory is sampled (psutil, every 0.2 s) as the summed RSS of the child and
all its descendants (task-runner workers); the child also reports its own
``ru_maxrss`` and the largest of its reaped children's.  Figures only; nothing
is asserted.  Timings under other load on the machine are pessimistic.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import os
import resource
import shutil
import signal
import socket
import statistics
import subprocess
import sys
import tempfile
import threading
import time
import urllib.request
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from changekind.tasks.simulate import arma_filter

MINUTE_START = pd.Timestamp("2031-03-01 00:00")
BACKFILL_START = pd.Timestamp("2031-05-01 00:00")
ROOT = Path(__file__).resolve().parents[2]
ROW_GROUP_ROWS = 120_000  # about 250 minute series of 480 points per row group


# -- data -------------------------------------------------------------------------


def series_ids(n: int) -> list[str]:
    return [f"edge-{i // 100:03d}/node-{i % 100:02d}" for i in range(n)]


def fleet_values(
    rng: np.random.Generator, n: int, points: int, *, events_before: int | None = None
) -> np.ndarray:
    """(n, points) AR(1) latencies; a level shift in a third, a spike in a third.

    The injected events fall before ``events_before`` (default the end).
    """
    phi = rng.uniform(0.2, 0.7, size=n)
    noise = rng.normal(size=(n, points + 200))
    y = np.empty((n, points + 200))
    for i in range(n):  # lfilter per row: each series has its own phi
        y[i] = arma_filter(noise[i], ar=(phi[i],))
    y = y[:, 200:] + rng.uniform(20.0, 100.0, size=(n, 1))
    last = points if events_before is None else events_before
    lo, hi = last // 5, last - max(5, last // 20)
    for i in range(n):
        if i % 3 == 0:
            y[i, int(rng.integers(lo, hi)) :] += 6.0
        elif i % 3 == 1:
            y[i, int(rng.integers(lo, hi))] += 9.0
    return y


def write_part(path: Path, ids: list[str], stamps: pd.DatetimeIndex, values: np.ndarray) -> int:
    """One Parquet file, rows sorted by series id then time."""
    n, t = values.shape
    table = pa.table(
        {
            "series_id": pa.array(np.repeat(np.asarray(ids, dtype=object), t), pa.string()),
            "timestamp": pa.array(np.tile(stamps.values.astype("datetime64[us]"), n)),
            "value": pa.array(values.reshape(-1)),
        }
    )
    pq.write_table(table, path, row_group_size=ROW_GROUP_ROWS)
    return table.num_rows


def inject_new_events(rng: np.random.Generator, y: np.ndarray, new: int) -> None:
    """Events in the last ``new`` points of about 3 % of the series (1 % shifts, 2 % spikes)."""
    n, points = y.shape
    hit = rng.random(n)
    for i in np.flatnonzero(hit < 0.03):
        k = points - new + int(rng.integers(new // 4, new - 5))
        if hit[i] < 0.01:
            y[i, k:] += 6.0
        else:
            y[i, k] += 9.0


# -- one flow run in a child process ------------------------------------------------


def run_flow_child(args: argparse.Namespace) -> None:
    """``run-flow``: run one flow, write a JSON report (called in a fresh process)."""
    t_proc = time.perf_counter()
    from changekind.flows.pipeline import make_task_runner
    from changekind.flows.scan import backfill_flow, scan_flow
    from changekind.flows.settings import RunOptions

    t_imported = time.perf_counter()
    options = RunOptions(workers=args.workers)
    # The planning (stored state, works, batches) is timed inside the flow
    # (RunSummary.timings "open" and "plan"); doing it here as well would add
    # its cost to the process's wall and CPU.
    runner = make_task_runner(args.runner, workers=args.workers)
    flow = {"scan": scan_flow, "backfill": backfill_flow}[args.kind].with_options(
        task_runner=runner
    )
    kwargs: dict = {"options": options}
    if args.kind == "backfill":
        kwargs.update(start=args.start, end=args.end, chunk=args.chunk, warmup=args.warmup)
    t_call = time.perf_counter()
    summary = flow(args.source, db=args.db, **kwargs)
    t_done = time.perf_counter()
    me = resource.getrusage(resource.RUSAGE_SELF)
    kids = resource.getrusage(resource.RUSAGE_CHILDREN)
    report = {
        "import_s": t_imported - t_proc,
        "flow_call_s": t_done - t_call,
        "flow_body_s": summary.seconds,
        "summary": {
            k: getattr(summary, k)
            for k in (
                "series_total",
                "series_ok",
                "series_failed",
                "deferred",
                "cold",
                "warm",
                "batches",
                "events_new",
                "events_changed",
                "events_retracted",
            )
        },
        "timings": dict(summary.timings),
        "maxrss_self_mb": me.ru_maxrss / 1024,
        "maxrss_children_mb": kids.ru_maxrss / 1024,
        "cpu_self_s": me.ru_utime + me.ru_stime,
        "cpu_children_s": kids.ru_utime + kids.ru_stime,
    }
    Path(args.out).write_text(json.dumps(report))


# -- the parent: data, server, children, tables --------------------------------------


class Sampler:
    """Peak summed RSS of a process and its descendants, sampled in a thread."""

    def __init__(self, pid: int, every: float = 0.2) -> None:
        import psutil

        self._proc = psutil.Process(pid)
        self._every = every
        self.peak = 0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._loop, daemon=True)
        self._thread.start()

    def _loop(self) -> None:
        import psutil

        while not self._stop.is_set():
            try:
                procs = [self._proc, *self._proc.children(recursive=True)]
                total = 0
                for p in procs:
                    with contextlib.suppress(psutil.Error):
                        total += p.memory_info().rss
                self.peak = max(self.peak, total)
            except psutil.Error:
                return
            self._stop.wait(self._every)

    def stop(self) -> float:
        self._stop.set()
        self._thread.join(timeout=5)
        return self.peak / 2**20


def child_env(api_url: str | None, home: Path) -> dict[str, str]:
    env = {
        **os.environ,
        "PREFECT_HOME": str(home),
        "PREFECT_SERVER_ANALYTICS_ENABLED": "false",
        "PREFECT_LOGGING_LEVEL": "WARNING",
        "PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS": "180",
    }
    if api_url:
        env["PREFECT_API_URL"] = api_url
    return env


def _tree_cpu(pid: int | None) -> float:
    """CPU seconds used so far by a process and its live descendants."""
    import psutil

    if pid is None:
        return 0.0
    total = 0.0
    try:
        root = psutil.Process(pid)
        for p in (root, *root.children(recursive=True)):
            with contextlib.suppress(psutil.Error):
                t = p.cpu_times()
                total += t.user + t.system
    except psutil.Error:
        pass
    return total


def _machine_busy() -> float:
    """CPU seconds all processes on the machine used so far (every core)."""
    import psutil

    t = psutil.cpu_times()
    return t.user + t.nice + t.system + getattr(t, "irq", 0.0) + getattr(t, "softirq", 0.0)


def run_child(
    kind: str,
    source: Path,
    db: str,
    runner: str,
    args: argparse.Namespace,
    env: dict[str, str],
    extra: tuple[str, ...] = (),
) -> dict:
    out = Path(tempfile.mkstemp(suffix=".json", dir=args.workdir)[1])
    cmd = [
        args.python,
        "-m",
        "tests.benchmarks.bench_fleet",
        "run-flow",
        "--kind",
        kind,
        "--source",
        str(source),
        "--db",
        db,
        "--runner",
        runner,
        "--workers",
        str(args.workers),
        "--out",
        str(out),
        *extra,
    ]
    server_cpu0, busy0 = _tree_cpu(args.server_pid), _machine_busy()
    t0 = time.perf_counter()
    # The child imports this module as tests.benchmarks.bench_fleet: run it from the root.
    proc = subprocess.Popen(cmd, env=env, cwd=code_root(args.python), start_new_session=True)
    sampler = Sampler(proc.pid)
    try:
        code = proc.wait(timeout=args.run_timeout)
    except subprocess.TimeoutExpired:
        os.killpg(proc.pid, signal.SIGKILL)
        proc.wait()
        sampler.stop()
        raise SystemExit(f"{kind} on {runner} did not finish within {args.run_timeout} s") from None
    wall = time.perf_counter() - t0
    peak = sampler.stop()
    server_cpu, busy = _tree_cpu(args.server_pid) - server_cpu0, _machine_busy() - busy0
    if code != 0:
        raise SystemExit(f"{kind} on {runner} exited with {code}")
    report = json.loads(out.read_text())
    report.update(
        process_wall_s=wall,
        peak_tree_rss_mb=peak,
        runner=runner,
        server_cpu_s=server_cpu,
        machine_cpu_s=busy,
        machine_cpu_avail_s=wall * (os.cpu_count() or 1),
    )
    return report


def code_root(python: str) -> Path:
    """The checkout whose code an interpreter runs: ROOT, or the parent of its .venv."""
    if python == sys.executable:
        return ROOT
    return Path(python).absolute().parents[2]


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def start_server(
    home: Path, log: Path, database: str | None, *, port: int | None = None
) -> tuple[subprocess.Popen, str]:
    port = free_port() if port is None else port
    url = f"http://127.0.0.1:{port}/api"
    env = child_env(None, home)
    env.pop("PREFECT_API_URL", None)
    if database:
        env["PREFECT_SERVER_DATABASE_CONNECTION_URL"] = database
    prefect = str(Path(sys.executable).with_name("prefect"))
    proc = subprocess.Popen(
        [prefect, "server", "start", "--host", "127.0.0.1", "--port", str(port)],
        env=env,
        stdout=log.open("w"),
        stderr=subprocess.STDOUT,
        start_new_session=True,
    )
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline:
        try:
            with urllib.request.urlopen(f"{url}/health", timeout=2) as r:
                if r.status == 200:
                    return proc, url
        except OSError:
            time.sleep(1)
    stop_server(proc)
    raise SystemExit(f"the Prefect server did not answer at {url} within 120 s; see {log}")


def stop_server(proc: subprocess.Popen) -> None:
    if proc.poll() is not None:
        return
    os.killpg(proc.pid, signal.SIGTERM)
    try:
        proc.wait(timeout=20)
    except subprocess.TimeoutExpired:
        os.killpg(proc.pid, signal.SIGINT)
        try:
            proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait()


def profile_rows(report: dict, workers: int) -> list[tuple[str, float]]:
    """Where a run's wall time went (read/analyse are summed over workers)."""
    t = report["timings"]
    plan = t.get("open", 0.0) + t.get("plan", 0.0)
    compute = (t.get("read", 0.0) + t.get("analyse", 0.0)) / workers
    accounted = plan + t.get("write", 0.0) + compute
    return [
        ("process start + imports", report["import_s"]),
        ("flow call, end to end", report["flow_call_s"]),
        ("  of which: opening and planning (source, ids, stored state, works)", plan),
        ("  of which: read (sum over batches)", t.get("read", 0.0)),
        ("  of which: analyse (sum over batches)", t.get("analyse", 0.0)),
        (f"  (read + analyse) / {workers} workers", compute),
        ("  of which: DB writes (flow process, serial)", t.get("write", 0.0)),
        (
            "  Prefect and the rest = call - planning - writes - compute/workers",
            report["flow_call_s"] - accounted,
        ),
        ("flow body (RunSummary.seconds)", report["flow_body_s"]),
        ("Prefect around the body = call - body", report["flow_call_s"] - report["flow_body_s"]),
    ]


def print_run(title: str, report: dict, n: int, workers: int) -> None:
    s = report["summary"]
    print(f"\n### {title} ({report['runner']})\n")
    print("| figure | value |")
    print("|---|---|")
    print(
        f"| series total / ok / failed / deferred | {s['series_total']} / {s['series_ok']} / "
        f"{s['series_failed']} / {s['deferred']} |"
    )
    print(f"| cold (fitted; a backfill: in any chunk) / warm series | {s['cold']} / {s['warm']} |")
    print(
        f"| events new / changed / retracted | {s['events_new']} / {s['events_changed']} / "
        f"{s['events_retracted']} |"
    )
    print(f"| batches run | {s['batches']} |")
    print(f"| process wall, end to end (s) | {report['process_wall_s']:.1f} |")
    print(f"| per series (ms, process wall / {n}) | {1000 * report['process_wall_s'] / n:.2f} |")
    print(f"| peak RSS, process tree summed (MB) | {report['peak_tree_rss_mb']:.0f} |")
    ours = report["cpu_self_s"] + report["cpu_children_s"]
    other = report["machine_cpu_s"] - ours - report["server_cpu_s"]
    print(
        f"| CPU s: flow process / task workers / Prefect server / rest of machine | "
        f"{report['cpu_self_s']:.0f} / {report['cpu_children_s']:.0f} / "
        f"{report['server_cpu_s']:.0f} / {other:.0f} "
        f"(of {report['machine_cpu_avail_s']:.0f} available) |"
    )
    print(
        f"| ru_maxrss flow process / largest child (MB) | {report['maxrss_self_mb']:.0f} / "
        f"{report['maxrss_children_mb']:.0f} |"
    )
    print("\n| where the time went | seconds |")
    print("|---|---|")
    for label, value in profile_rows(report, workers):
        print(f"| {label} | {value:.1f} |")


def part_warm(args: argparse.Namespace, env: dict[str, str], rng: np.random.Generator) -> None:
    n, hist, new = args.series, args.history, args.new
    root = args.workdir / "warm"
    source = root / "source"
    base_db = root / "after-cold.db"
    stamp = root / "prepared.json"
    shape = {"series": n, "history": hist, "new": new, "seed": args.seed}
    cold = None
    if args.reuse and stamp.exists() and json.loads(stamp.read_text()) == shape:
        # --reuse: the data and the after-cold database of an earlier run with
        # the same shape; only the warm scans run again.
        print(f"\nwarm-scan data and after-cold database reused from {root} ({shape})")
    else:
        if root.exists():
            shutil.rmtree(root)
        source.mkdir(parents=True)
        ids = series_ids(n)
        t0 = time.perf_counter()
        # One AR(1) path per series: the history, then the new hour that continues it.
        values = fleet_values(rng, n, hist + new, events_before=hist)
        inject_new_events(rng, values, new)
        stamps = pd.date_range(MINUTE_START, periods=hist + new, freq="min")
        rows = write_part(source / "part-0.parquet", ids, stamps[:hist], values[:, :hist])
        print(
            f"\nwarm-scan data: {n} series x {hist} minute points = {rows:,} rows "
            f"({time.perf_counter() - t0:.1f} s to build)"
        )
        cold = run_child("scan", source, f"sqlite:///{base_db}", args.cold_runner, args, env)
        print_run(f"cold scan: {n} series x {hist} points", cold, n, args.workers)

        # The new hour arrives as one more file, as an hourly export job writes it.
        write_part(source / "part-1.parquet", ids, stamps[hist:], values[:, hist:])
        del values
        stamp.write_text(json.dumps(shape))
    warm_runs = {}
    walls: dict[str, list[float]] = {}
    reps: dict[str, list[dict]] = {}
    for i in range(1, args.repeat + 1):
        for runner in args.runners:
            db = root / f"warm-{runner}.db"
            shutil.copyfile(base_db, db)
            rep = run_child("scan", source, f"sqlite:///{db}", runner, args, env)
            walls.setdefault(runner, []).append(rep["process_wall_s"])
            reps.setdefault(runner, []).append(rep)
            print_run(
                f"warm scan {i}/{args.repeat}: {n} series, {new} new points each",
                rep,
                n,
                args.workers,
            )
    for runner, runs in reps.items():
        # The run of median wall time (upper median) stands for the runner below.
        warm_runs[runner] = sorted(runs, key=lambda r: r["process_wall_s"])[len(runs) // 2]
    if args.repeat > 1:
        print(f"\n### warm scan wall times ({args.python})\n")
        print("| runner | runs (s) | median (s) | best (s) |")
        print("|---|---|---|---|")
        for runner, times in walls.items():
            runs = ", ".join(f"{t:.1f}" for t in times)
            print(f"| {runner} | {runs} | {statistics.median(times):.1f} | {min(times):.1f} |")
    args.results["warm"] = {**({"cold": cold} if cold else {}), **warm_runs}
    if args.profile_sample:
        engine_profile(f"sqlite:///{base_db}", source, args.profile_sample)


def engine_profile(db: str, source: Path, sample: int) -> None:
    """Warm analysis of a sample of series in this process, by outcome (no Prefect).

    Planned from the database as it was after the cold scan; batches of 200
    through :func:`changekind.tasks.batch.run_batch`, one process, serially.
    """
    from changekind.flows.pipeline import plan_works
    from changekind.flows.records import stored_state
    from changekind.flows.settings import RunOptions
    from changekind.tasks.batch import run_batch, start_worker
    from changekind.tasks.fetch import list_series, open_source

    start_worker()  # the libraries a worker loads before its first batch
    options = RunOptions().analysis()
    spec = open_source(str(source))
    ids = list_series(spec)[:sample]
    models, marks, known, _ = stored_state(db, ids)
    works = plan_works(
        ids,
        models=models,
        watermarks=marks,
        known=known,
        options=options,
        time_kind=spec.time_kind,
    )
    read = 0.0
    by_mode: dict[str, list[float]] = {}
    warm_ids: set[str] = set()
    cpu0, wall0 = time.process_time(), time.perf_counter()
    for i in range(0, len(works), 200):
        out = run_batch(spec, works[i : i + 200], options)
        read += out.read_seconds
        for o in out.outcomes:
            # A warm series whose model had to be refitted comes back cold; its
            # seconds are those of the cold fit on the whole history.
            label = "refit (cold fit)" if o.mode == "cold" and o.series_id in models else o.mode
            by_mode.setdefault(label, []).append(o.seconds)
            if o.mode == "warm":
                warm_ids.add(o.series_id)
    cpu, wall = time.process_time() - cpu0, time.perf_counter() - wall0
    print(f"\n### warm analysis without Prefect: {len(works)} series, one process\n")
    print("| outcome | series | seconds (sum) | ms per series | share of analysis |")
    print("|---|---|---|---|---|")
    total = sum(sum(v) for v in by_mode.values())
    for mode, secs in sorted(by_mode.items()):
        print(
            f"| {mode} | {len(secs)} | {sum(secs):.1f} | {1000 * sum(secs) / len(secs):.1f} | "
            f"{100 * sum(secs) / total:.0f} % |"
        )
    print(f"| batch reads (first read of each batch) | | {read:.1f} | | |")
    print(f"| whole sample: wall / CPU of this process | | {wall:.1f} / {cpu:.1f} | | |")
    profile_warm_path(spec, [w for w in works if w.series_id in warm_ids], options)


# Functions of the warm path, by stage (cumulative time; a stage's functions do
# not call each other); "file.py:name" picks one module's function.
WARM_STAGES = {
    "regularize (grid, gaps)": ("regularize",),
    "screen_new_points: search (inner loop, joint)": ("inner_loop",),
    "screen_new_points: pi weights": ("pi_weights",),
    "screen_new_points: robust residual scale": ("robust_sigma",),
    "screen_new_points: removing known events' effects": ("known_effects",),
    "screen_new_points: type weights of events found": ("weights_for",),
    "screen_new_points: critical values": ("series_thresholds",),
    "refit decision (drift test, age, LS)": ("_needs_refit",),
    "watermark / event placement": ("_after_watermark", "_position", "_last_observed"),
    "BLAS one-thread limit, set and restored per call (threadpoolctl)": (
        "threads.py:_enter",
        "threads.py:_leave",
    ),
}


def profile_warm_path(spec, works, options) -> None:
    """cProfile of analyse_series_work on series that stay warm (data read first)."""
    import cProfile
    import pstats

    from changekind.tasks.batch import analyse_series_work
    from changekind.tasks.fetch import SeriesWindow, read_windows

    if not works:
        return
    frame = read_windows(spec, [SeriesWindow(w.series_id, w.start, w.end) for w in works])
    groups = {sid: g for sid, g in frame.groupby("series_id", sort=False)}
    prof = cProfile.Profile()
    t0 = time.perf_counter()
    prof.enable()
    for w in works:
        g = groups[w.series_id]
        analyse_series_work(w, g["timestamp"], g["value"], options)
    prof.disable()
    total = time.perf_counter() - t0
    stats = pstats.Stats(prof)
    print(f"\n### where a warm series' analysis goes (cProfile, {len(works)} warm series)\n")
    print("| stage | ms per series | share |")
    print("|---|---|---|")
    shown = 0.0
    for label, names in WARM_STAGES.items():
        cum = sum(
            entry[3]
            for (path, _, func), entry in stats.stats.items()  # type: ignore[attr-defined]
            if func in names or f"{Path(path).name}:{func}" in names
        )
        shown += cum
        print(f"| {label} | {1000 * cum / len(works):.2f} | {100 * cum / total:.0f} % |")
    rest = total - shown
    print(
        f"| rest (pandas Series handling, dataclasses, ...) | {1000 * rest / len(works):.2f} "
        f"| {100 * rest / total:.0f} % |"
    )
    print(f"| total under the profiler | {1000 * total / len(works):.2f} | 100 % |")


def print_ratios(results: dict) -> None:
    """Per-series wall and CPU of every scan, and cold/warm ratios."""
    runs = []
    warm = results.get("warm", {})
    if "cold" in warm:
        runs.append(("cold", warm["cold"]))
    if "cold_reference" in results:
        runs.append(("cold", results["cold_reference"]))
    colds = list(runs)
    for runner, rep in warm.items():
        if runner != "cold":
            runs.append(("warm", rep))
    if not runs:
        return
    print("\n### per series: wall and CPU (flow process + task workers)\n")
    head = " | ".join(
        f"cold/warm vs {r['summary']['series_total']} x cold (wall, CPU)" for _, r in colds
    )
    print(f"| run | series | wall (s) | wall per series (ms) | CPU per series (ms) | {head} |")
    print("|---|---|---|---|---|" + "---|" * len(colds))
    for kind, rep in runs:
        n = rep["summary"]["series_total"]
        wall = rep["process_wall_s"] / n
        cpu = (rep["cpu_self_s"] + rep["cpu_children_s"]) / n
        ratios = []
        for _, c in colds:
            cn = c["summary"]["series_total"]
            c_wall = c["process_wall_s"] / cn
            c_cpu = (c["cpu_self_s"] + c["cpu_children_s"]) / cn
            ratios.append(f"{c_wall / wall:.1f}, {c_cpu / cpu:.1f}" if kind == "warm" else "")
        print(
            f"| {kind} ({rep['runner']}) | {n} | {rep['process_wall_s']:.1f} | "
            f"{1000 * wall:.2f} | {1000 * cpu:.2f} | " + " | ".join(ratios) + " |"
        )


def part_cold(args: argparse.Namespace, env: dict[str, str], rng: np.random.Generator) -> None:
    n, hist = args.cold_series, args.cold_history
    root = args.workdir / "cold"
    source = root / "source"
    source.mkdir(parents=True)
    write_part(
        source / "part-0.parquet",
        series_ids(n),
        pd.date_range(MINUTE_START, periods=hist, freq="min"),
        fleet_values(rng, n, hist),
    )
    rep = run_child("scan", source, f"sqlite:///{root / 'cold.db'}", args.cold_runner, args, env)
    print_run(f"cold reference: {n} series x {hist} points", rep, n, args.workers)
    args.results["cold_reference"] = rep


def part_backfill(args: argparse.Namespace, env: dict[str, str], rng: np.random.Generator) -> None:
    n, days = args.backfill_series, args.backfill_days
    root = args.workdir / "backfill"
    source = root / "source"
    source.mkdir(parents=True)
    warmup = pd.Timedelta(args.warmup)
    start = BACKFILL_START
    end = start + pd.Timedelta(days=days)
    stamps = pd.date_range(start - warmup, end, freq="h", inclusive="left")
    rows = write_part(
        source / "part-0.parquet", series_ids(n), stamps, fleet_values(rng, n, len(stamps))
    )
    print(
        f"\nbackfill data: {n} hourly series x {len(stamps)} points = {rows:,} rows "
        f"(warm-up {args.warmup} + {days} days)"
    )
    for runner in args.backfill_runners:
        db = root / f"backfill-{runner}.db"
        rep = run_child(
            "backfill",
            source,
            f"sqlite:///{db}",
            runner,
            args,
            env,
            extra=(
                "--start",
                start.isoformat(),
                "--end",
                end.isoformat(),
                "--chunk",
                args.chunk,
                "--warmup",
                args.warmup,
            ),
        )
        print_run(
            f"backfill: {n} hourly series, {days} days, chunk {args.chunk}", rep, n, args.workers
        )
        args.results[f"backfill_{runner}"] = rep


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    sub = parser.add_subparsers(dest="command")
    child = sub.add_parser("run-flow", help="internal: one flow run in this process")
    child.add_argument("--kind", choices=["scan", "backfill"], required=True)
    child.add_argument("--source", required=True)
    child.add_argument("--db", required=True)
    child.add_argument("--runner", default="processes")
    child.add_argument("--workers", type=int, default=2)
    child.add_argument("--out", required=True)
    for name in ("--start", "--end", "--chunk", "--warmup"):
        child.add_argument(name)

    parser.add_argument(
        "--parts",
        default="warm,cold,backfill",
        help="comma-separated: warm, cold, backfill (default all)",
    )
    parser.add_argument("--series", type=int, default=10_000, help="warm scan: series")
    parser.add_argument("--history", type=int, default=480, help="warm scan: points fitted cold")
    parser.add_argument("--new", type=int, default=60, help="warm scan: new points per series")
    parser.add_argument("--cold-series", type=int, default=500)
    parser.add_argument("--cold-history", type=int, default=1440)
    parser.add_argument("--cold-runner", default="processes")
    parser.add_argument("--runners", default="processes,threads", help="warm scan runners")
    parser.add_argument(
        "--profile-sample",
        type=int,
        default=1000,
        help="warm scan: series analysed again without Prefect, by outcome (0: skip)",
    )
    parser.add_argument("--backfill-series", type=int, default=1_000)
    parser.add_argument("--backfill-days", type=int, default=30)
    parser.add_argument("--backfill-runners", default="processes")
    parser.add_argument("--chunk", default="7D")
    parser.add_argument("--warmup", default="7D")
    parser.add_argument("--workers", type=int, default=os.cpu_count() or 1)
    parser.add_argument("--repeat", type=int, default=1, help="warm scan: runs per runner")
    parser.add_argument("--run-timeout", type=float, default=5400, help="seconds per flow run")
    parser.add_argument("--api-url", help="an existing Prefect API (default: start one here)")
    parser.add_argument(
        "--server-database",
        help="database of the Prefect server started here, e.g. "
        "postgresql+asyncpg://postgres@127.0.0.1:5432/prefect (default: SQLite in the work dir)",
    )
    parser.add_argument("--workdir", type=Path, help="keep data here (default: a temp dir)")
    parser.add_argument(
        "--reuse",
        action="store_true",
        help="warm scan: reuse the data and after-cold database kept in --workdir by an "
        "earlier run of the same --series/--history/--new/--seed (skips the cold scan)",
    )
    parser.add_argument(
        "--python",
        default=sys.executable,
        help="interpreter that runs the flows (e.g. another checkout's .venv/bin/python, "
        "to compare old and new code in one sitting)",
    )
    parser.add_argument("--seed", type=int, default=2031)
    parser.add_argument("--json", type=Path, help="also write every figure here as JSON")
    args = parser.parse_args(argv)
    if args.command == "run-flow":
        run_flow_child(args)
        return

    args.runners = [r for r in args.runners.split(",") if r]
    args.backfill_runners = [r for r in args.backfill_runners.split(",") if r]
    parts = [p for p in args.parts.split(",") if p]
    unknown = set(parts) - {"warm", "cold", "backfill"}
    if unknown:
        parser.error(f"unknown part(s) {sorted(unknown)}; use warm, cold, backfill")
    cleanup = args.workdir is None
    args.workdir = Path(args.workdir or tempfile.mkdtemp(prefix="changekind-bench-")).resolve()
    args.workdir.mkdir(parents=True, exist_ok=True)
    args.results = {}
    args.server_pid = None
    home = args.workdir / "prefect-home"
    server = None
    print(f"# changekind fleet benchmark ({args.workers} workers, work dir {args.workdir})")
    try:
        if args.api_url:
            url = args.api_url
        else:
            t0 = time.perf_counter()
            server, url = start_server(
                home, args.workdir / "prefect-server.log", args.server_database
            )
            args.server_pid = server.pid
            print(f"Prefect server at {url} (healthy after {time.perf_counter() - t0:.0f} s)")
        env = child_env(url, home)
        rng = np.random.default_rng(args.seed)
        steps = {"warm": part_warm, "cold": part_cold, "backfill": part_backfill}
        for part in parts:
            t0 = time.perf_counter()
            steps[part](args, env, rng)
            print(f"\n({part}: {time.perf_counter() - t0:.0f} s including data preparation)")
        print_ratios(args.results)
    finally:
        if server is not None:
            stop_server(server)
        if args.json:
            args.json.write_text(json.dumps(args.results, indent=1, default=str))
        if cleanup:
            shutil.rmtree(args.workdir, ignore_errors=True)


if __name__ == "__main__":
    main()
