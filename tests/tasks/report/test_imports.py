"""Importing the report does not import Prefect; the flows build its Prefect task.

Like ``test_detect_does_not_import_prefect`` in tests/flows/cli/test_detect.py: a
fresh interpreter imports every module of the package and says whether
``prefect`` got loaded.  Read-only commands (``changekind report``) must not
pay Prefect's start-up for a look at the database.
"""

from __future__ import annotations

import pytest

from tests.fresh import run_python

CODE = """
import importlib, pkgutil, sys
import changekind.tasks.report as report
names = [m.name for m in pkgutil.walk_packages(report.__path__, report.__name__ + ".")]
for name in names:
    importlib.import_module(name)
assert "changekind.tasks.report.data" in names and "changekind.tasks.report.html" in names
report.render_report([], {}, report.summarize_events([]))  # templates load and render
print(len(names), "prefect" in sys.modules)
"""


@pytest.mark.integration  # a fresh interpreter
def test_importing_every_report_module_does_not_load_prefect():
    done = run_python(CODE)
    assert done.returncode == 0, done.stderr
    n_modules, loaded = done.stdout.split()
    assert int(n_modules) >= 10 and loaded == "False"


def test_the_flows_run_the_report_as_a_prefect_task():
    from prefect import Task

    from changekind.flows.steps import write_report_task
    from changekind.tasks.report import data

    assert isinstance(write_report_task, Task)
    assert write_report_task.fn is data.write_stored_report
    assert write_report_task.name == "write-report"
