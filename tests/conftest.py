"""Shared test settings: no progress bars, a headless plotting backend."""

import os

# matplotlib reads the backend from the environment when it is first imported (by the report
# tests only); setting it here keeps the other tests free of matplotlib
os.environ.setdefault("MPLBACKEND", "Agg")
