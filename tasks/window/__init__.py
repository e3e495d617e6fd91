"""Windowed mode: summarize fine-grained series into windows, detect, drill back in.

A series sampled every second holds 86,400 points a day, far more than the
engine needs to see a level shift that lasts hours.  Three pure steps, one
module each:

- ``summary``: :func:`~changekind.tasks.window.summary.summarize_windows`
  aggregates the raw points into fixed windows (first, max, min, last, median,
  robust spread, count); the window width and the warm scan's bookkeeping;
- ``detection``: :func:`~changekind.tasks.window.detection.detect_windowed`
  runs the engine on the window medians (level events: AO, LS, TC, IO) and on
  the log of the window spreads (a lasting step there is a variance change,
  reported as ``"VC"``); every event names its window; the warm screen;
- ``drill``: :func:`~changekind.tasks.window.drill.drill` reads back from the
  source exactly the raw rows of one window and of the windows around it, with
  the time filter pushed down to the storage.

Import from the modules; this package re-exports nothing.
"""
