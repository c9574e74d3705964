"""Every Python block of README.md and docs/*.md runs as written, and the numbers it claims hold.

A block runs in a fresh namespace (as ``__main__``, in an empty working folder), unless its
first line is a comment saying "(continues ...)": then it runs with the names of every block
before it in the same file. After the blocks of a file have run, the checks registered for it
below test the claims the text makes; their sources are named beside them.
"""

from __future__ import annotations

import math
import re
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
DOCS = [ROOT / "README.md", *sorted((ROOT / "docs").glob("*.md"))]
#: documents whose blocks define components (which register their names): run in a fresh interpreter
ISOLATED = [ROOT / "DEVELOPERS.md"]
BLOCK = re.compile(r"^```python\n(.*?)^```$", re.S | re.M)
CONTINUES = re.compile(r"\A#\s*\(continues\b")


def python_blocks(path: Path) -> list[str]:
    return [m.group(1) for m in BLOCK.finditer(path.read_text(encoding="utf-8"))]


def run_blocks(path: Path) -> list[dict]:
    """Execute the file's blocks in order; the namespace each block ended with."""
    spaces: list[dict] = []
    for i, code in enumerate(python_blocks(path)):
        if CONTINUES.match(code):
            assert spaces, f"{path.name} block {i + 1} says it continues, but no block comes before it"
            ns = {}
            for earlier in spaces:
                ns.update(earlier)
        else:
            ns = {"__name__": "__main__"}
        exec(compile(code, f"{path.name}[python block {i + 1}]", "exec"), ns)
        spaces.append(ns)
    return spaces


def check_readme(spaces):
    first = spaces[0]
    res, sp = first["res"], first["sp"]
    t = res.summaries["t_test"]
    # "about 0.80 +- 0.004 (Cohen 1988: 64 per arm for d = 0.5)": the exact noncentral-t power at
    # 64 per arm is 0.8015 (Cohen 1988, Table 2.3.5, from memory; scipy's noncentral t below)
    from scipy import stats

    df, nc = 126, 0.5 * math.sqrt(64 / 2)
    crit = stats.t.ppf(0.975, df)
    exact = stats.nct.sf(crit, df, nc) + stats.nct.cdf(-crit, df, nc)
    assert round(exact, 4) == 0.8015
    assert math.isclose(t["analytic_power"], exact, rel_tol=1e-9)
    assert abs(res.power - exact) < 4 * res.mcse
    assert 0.0035 < res.mcse < 0.0045  # sqrt(0.8 * 0.2 / 10000) = 0.004
    assert round(sp.analytic.t_n(0.5, 0.8, design="two-sample"), 2) == 63.77
    # the custom-process example: lognormal arms, ratio 1.5, 40 per arm, Mann-Whitney
    custom = spaces[1]["res"]
    assert 0.0 < custom.power < 1.0 and custom.reps == 2000
    # the planning block: the closed form (64 per arm, noncentral t, as above) is printed beside the
    # answer and lies in the answer's 95% Monte Carlo interval; run_to_mcse reached its MCSE
    planning = spaces[2]
    size = planning["size"]
    assert size.analytic == 64
    assert size.interval[0] <= 64 <= size.interval[1]
    assert planning["res"].mcse <= 0.005


CHECKS = {"README.md": check_readme}


@pytest.mark.slow
@pytest.mark.parametrize("path", [p for p in DOCS if python_blocks(p)], ids=lambda p: p.name)
def test_python_blocks_run_as_written(path, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    spaces = run_blocks(path)
    if path.name in CHECKS:
        CHECKS[path.name](spaces)


@pytest.mark.slow
@pytest.mark.parametrize("path", ISOLATED, ids=lambda p: p.name)
def test_python_blocks_run_as_written_in_a_fresh_interpreter(path, tmp_path):
    import subprocess
    import sys

    assert python_blocks(path), f"{path.name} has no Python block"
    code = f"import sys; sys.path.insert(0, {str(Path(__file__).parent)!r}); import test_docs; " \
           f"test_docs.run_blocks(test_docs.Path({str(path)!r}))"
    done = subprocess.run([sys.executable, "-c", code], cwd=tmp_path, capture_output=True, text=True,
                          env={**__import__("os").environ, "MPLBACKEND": "Agg"})
    assert done.returncode == 0, done.stderr[-3000:]


def test_every_continuing_block_follows_another():
    for path in DOCS + ISOLATED:
        blocks = python_blocks(path)
        if blocks:
            assert not CONTINUES.match(blocks[0]), f"{path.name}: its first Python block cannot continue another"
