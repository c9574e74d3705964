"""Shared test settings: no progress bars, a headless plotting backend, and a clear stop when
simpower's dependencies are not installed in the interpreter running the tests."""

import importlib.util
import os

import pytest

# matplotlib reads the backend from the environment when it is first imported (by the report
# tests only); setting it here keeps the other tests free of matplotlib
os.environ.setdefault("MPLBACKEND", "Agg")

#: the packages every test module needs (pyproject.toml: dependencies and the `test` extra)
REQUIRED = ("numpy", "scipy", "pandas", "joblib", "statsmodels", "hypothesis")


def pytest_configure(config):
    missing = [name for name in REQUIRED if importlib.util.find_spec(name) is None]
    if missing:
        pytest.exit(f"this Python lacks {', '.join(missing)}: install simpower with its test extras first, "
                    f"python -m pip install '.[test]' (README, 'Install and run the tests')", returncode=4)
