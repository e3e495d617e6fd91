"""changekind test suite."""
