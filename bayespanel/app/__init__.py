"""The application layer: the run behind ``bayespanel fit`` (settings, stages,
results.json) and the command line."""
