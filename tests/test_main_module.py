"""``python -m ledger`` is the command-line interface (a CLI convention: common practice, no source)."""

from __future__ import annotations

import subprocess
import sys


def test_python_dash_m_runs_the_cli(tmp_path):
    db = tmp_path / "m.db"
    out = subprocess.run([sys.executable, "-m", "ledger", "--db", str(db), "init"],
                         capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    assert db.exists()
    listing = subprocess.run([sys.executable, "-m", "ledger", "--db", str(db), "loop", "list"],
                             capture_output=True, text=True, timeout=120)
    assert listing.returncode == 0, listing.stderr
