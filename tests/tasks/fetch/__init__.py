"""Tests of changekind.tasks.fetch against real files and databases.

Every read is checked row for row against pandas filtering the same in-memory
frame the sources were written from (pandas is the oracle: boolean masks on
``series_id`` and on UTC timestamps, then a sort).  The data is an invented
fleet of pumps on a water network, hourly, starting 2031-05-01 (``sources.py``).
"""
