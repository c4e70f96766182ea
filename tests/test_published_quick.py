"""The published-yardstick benchmark builds its table in quick mode (issue 5: run in CI).

This checks that benchmarks/published.py runs end to end through synth's public API and
writes the Markdown table and the plot; the figures themselves are measurements, quoted
in benchmarks/results/published.md, not asserted here.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def test_published_quick_builds_the_table(tmp_path):
    r = subprocess.run([sys.executable, str(ROOT / "benchmarks" / "published.py"), "--quick", "--out", str(tmp_path)],
                       capture_output=True, text=True, timeout=900, cwd=ROOT)
    assert r.returncode == 0, r.stderr[-2000:]
    md = (tmp_path / "published_quick.md").read_text()
    assert "## Summary" in md and "## Fundamental limits" in md
    # the quick plants appear with each published rule evaluated by synth's evaluator
    for plant in ("1:n=4", "4:T=1"):
        for rule in ("SIMC PI", "AMIGO PI", "ZN PI"):
            assert any(line.startswith(f"| {plant} ") and f"| {rule} |" in line for line in md.splitlines()), \
                (plant, rule)
    assert "(s-4)/((s-1)*(s+2))" in md                 # an interpolation-bound plant
    assert (tmp_path / "published_quick.png").stat().st_size > 10_000
