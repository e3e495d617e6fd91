"""What a warm scan with nothing new imports: no module it does not use.

A scan of a small fleet with nothing new filters, fits and draws nothing, so
it should not pay for scipy.signal and scipy.optimize (about 0.7 s together),
matplotlib (0.4 s) or Alembic (0.4 s) on start-up (issue 14: warm scans of 30
series under 5 s).  Measured with ``python -X importtime`` on this machine.
"""

from __future__ import annotations

import pytest

from tests.fresh import run_python


@pytest.mark.parametrize(
    "module",
    ["changekind.flows.scan", "changekind.flows.cli.runs", "changekind.tasks.batch"],
)
def test_fleet_modules_import_no_filtering_fitting_or_drawing(module):
    heavy = ("scipy.signal", "scipy.optimize", "scipy.stats", "matplotlib", "alembic")
    code = (
        "import sys\n"
        f"import {module}\n"
        f"print(' '.join(m for m in {heavy!r} if m in sys.modules) or 'none')\n"
    )
    done = run_python(code)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == "none"
