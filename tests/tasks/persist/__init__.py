"""Tests of the persistence layer on a real SQLite file and the real PostgreSQL server.

The reference is the input itself: what goes in must come back (bit for bit
for floats); expected rows of the views are worked out by hand or by pandas
from the same input, independently of the SQL.  Every test taking the
``url``/``engine`` fixture runs on both databases.
"""
