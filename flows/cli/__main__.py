"""``python -m changekind.flows.cli``: the console script without installing it."""

from changekind.flows.cli import main

main()
