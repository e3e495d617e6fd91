"""omegascan test suite."""
