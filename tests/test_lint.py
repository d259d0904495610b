"""Static checks CI runs: unused and undefined names, import order, and no private name used
outside its module (ruff's F, I and SLF rules; SLF001 is private-member access)."""
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def test_ruff_finds_nothing():
    ruff = shutil.which("ruff", path=str(Path(sys.executable).parent)) or shutil.which("ruff")
    if ruff is None:
        pytest.fail("ruff is not installed; it comes with the test extra (pip install -e '.[test]')")
    done = subprocess.run([ruff, "check", "--no-cache", "--select", "F,I,SLF", "hybrid", "tests"],
                          cwd=ROOT, capture_output=True, text=True)
    assert done.returncode == 0, done.stdout[-3000:]
