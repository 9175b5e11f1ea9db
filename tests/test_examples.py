"""The example walkthrough runs end to end on a small invented table."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

EXAMPLE = Path(__file__).resolve().parents[1] / "examples" / "water_cooperative.py"


def test_water_cooperative_walkthrough_runs_end_to_end(tmp_path):
    res = subprocess.run(
        [sys.executable, str(EXAMPLE), "--rows", "6000", "--workdir", str(tmp_path)],
        capture_output=True, text=True, timeout=300,
    )
    assert res.returncode == 0, res.stderr
    assert "1 changed" in res.stdout and "segment 0:" in res.stdout
    assert "None" not in res.stdout and "=True" not in res.stdout  # Python wording never reaches the reader
    assert (tmp_path / "saltmere.duckdb").exists()
