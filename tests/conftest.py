"""Shared test settings: no progress bars, a headless plotting backend."""

import os

import matplotlib

matplotlib.use("Agg")
os.environ.setdefault("MPLBACKEND", "Agg")
