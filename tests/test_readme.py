"""The README's walkthrough shows what the commands print today (assets/readme_walkthrough.py)."""

import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def test_readme_walkthrough_matches_the_commands():
    res = subprocess.run([sys.executable, str(ROOT / "assets" / "readme_walkthrough.py"), "--check"],
                         capture_output=True, text=True, timeout=900)
    assert res.returncode == 0, ("README.md's walkthrough differs from what the commands print; run "
                                 "`python assets/readme_walkthrough.py` and reread the prose around it.\n"
                                 + res.stdout[-4000:] + res.stderr[-2000:])
