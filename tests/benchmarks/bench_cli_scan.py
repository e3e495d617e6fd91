"""Wall time of ``changekind scan`` as a person runs it: 30 series, warm, nothing new.

Run by hand (it is not collected by pytest)::

    .venv/bin/python -m tests.benchmarks.bench_cli_scan [--series 30] [--repeat 3]

An invented hourly fleet (tests/flows/fleet.py) is written as Parquet; a first
``changekind scan`` fits every model (cold); then the same warm scan, with no
new points, is timed end to end as a fresh process (interpreter, imports,
Prefect, the flow) ``--repeat`` times in two settings:

* ephemeral: no ``PREFECT_API_URL`` and no server on 127.0.0.1:4200 looked
  for (``CHANGEKIND_LOCAL_PREFECT=false``) -- each command starts its own
  temporary Prefect server;
* local server (PREFECT_API_URL): ``prefect server start`` on 127.0.0.1
  (started here, stopped at the end) and ``PREFECT_API_URL`` pointing at it;
* local server (found on :4200): the same server on port 4200 and no
  ``PREFECT_API_URL``: the command finds it by itself, as README describes for
  people who scan by hand all day (measured only when port 4200 is free).

Prints the best and the median wall time of each.  Figures only; nothing is
asserted.  Timings under other load on the machine are pessimistic.

``--compare PATH`` names another checkout's ``changekind`` executable (for
example ``/tmp/old/.venv/bin/changekind``, an older commit installed in its own
virtualenv): both are then timed in every setting, alternately, on the same
fleet, database and server, so their ratio is measured in one sitting under the
same load.  ``--skip-ephemeral`` leaves the slow ephemeral setting out; ``--skip-4200`` never
takes port 4200.
"""

from __future__ import annotations

import argparse
import os
import socket
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from tests.benchmarks.bench_fleet import start_server, stop_server
from tests.flows.fleet import make_fleet, write_source


def scan(command: list[str], env: dict[str, str]) -> float:
    start = time.perf_counter()
    done = subprocess.run(command, env=env, capture_output=True, text=True, check=False)
    seconds = time.perf_counter() - start
    if done.returncode != 0:
        raise SystemExit(f"scan exited {done.returncode}: {done.stderr[-2000:]}")
    return seconds


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--series", type=int, default=30)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--compare", help="another changekind executable, timed alternately")
    parser.add_argument("--skip-ephemeral", action="store_true")
    parser.add_argument(
        "--skip-4200",
        action="store_true",
        help="never take port 4200 (on a shared machine others' commands would find the server)",
    )
    options = parser.parse_args()
    programs = {"this": str(Path(sys.executable).with_name("changekind"))}
    if options.compare:
        programs["compared"] = options.compare
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        data, _ = make_fleet(options.series, hours=24 * 14, seed=5)
        # The fleet holds a stuck (constant) series on purpose; scans name it and
        # exit 1.  Left out here: the figures are about start-up, not failures.
        data = data[data.groupby("series_id")["value"].transform("std") > 0]
        print(f"{data['series_id'].nunique()} series, {len(data):,} points")
        source = write_source(data, root / "source")
        db = f"sqlite:///{root / 'events.db'}"
        args = ["scan", "--source", str(source), "--db", db]
        env = {k: v for k, v in os.environ.items() if not k.startswith("PREFECT_")}
        env["PREFECT_HOME"] = str(root / "prefect-home")
        env["CHANGEKIND_LOCAL_PREFECT"] = "false"
        cold = scan([programs["this"], *args], env)
        print(f"cold scan of {options.series} series (ephemeral Prefect): {cold:.1f} s")
        results: dict[str, dict[str, list[float]]] = {}

        def measure(setting: str, setting_env: dict[str, str]) -> None:
            # Alternately, so both programs see the same load on the machine.
            for _ in range(options.repeat):
                for label, program in programs.items():
                    seconds = scan([program, *args], setting_env)
                    results.setdefault(setting, {}).setdefault(label, []).append(seconds)

        if not options.skip_ephemeral:
            measure("ephemeral", env)
        on_4200 = not options.skip_4200 and _port_free(4200)
        proc, url = start_server(
            root / "server-home", root / "server.log", None, port=4200 if on_4200 else None
        )
        try:
            with_server = {**env, "PREFECT_API_URL": url}
            for program in programs.values():
                scan([program, *args], with_server)  # first contact: the server creates the flow
            measure("local server (PREFECT_API_URL)", with_server)
            if on_4200:
                found = {k: v for k, v in env.items() if k != "CHANGEKIND_LOCAL_PREFECT"}
                measure("local server (found on :4200)", found)
            else:
                print("port 4200 not taken: the server found by probing was not measured")
        finally:
            stop_server(proc)
        for label, program in programs.items():
            print(f"{label}: {program}")
        head = f"{'warm scan, nothing new':32s} {'program':>9s} {'best s':>8s} {'median s':>9s}"
        print(f"{head}  runs")
        for setting, by_program in results.items():
            for label, times in by_program.items():
                runs = " ".join(f"{t:.2f}" for t in times)
                print(
                    f"{setting:32s} {label:>9s} {min(times):8.2f} "
                    f"{statistics.median(times):9.2f}  {runs}"
                )
            if len(by_program) == 2:
                ratio = statistics.median(by_program["compared"]) / statistics.median(
                    by_program["this"]
                )
                print(f"{setting:32s} {'ratio':>9s} {'':8s} {ratio:9.2f}  (compared / this)")


def _port_free(port: int) -> bool:
    with socket.socket() as s:
        try:
            s.bind(("127.0.0.1", port))
        except OSError:
            return False
    return True


if __name__ == "__main__":
    main()
