"""Code run in a fresh interpreter: what a module loads on import, a command's start-up."""

from __future__ import annotations

import os
import subprocess
import sys


def run_python(code: str) -> subprocess.CompletedProcess[str]:
    """Run ``code`` with ``python -c`` (warnings off), stdout and stderr captured as text."""
    return subprocess.run(
        [sys.executable, "-c", code],
        capture_output=True,
        text=True,
        timeout=300,
        check=False,
        env={**os.environ, "PYTHONWARNINGS": "ignore"},
    )
