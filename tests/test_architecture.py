"""The shape of the code: modules small enough to read whole, and the layering contracts of
pyproject.toml ([tool.importlinter], checked by import-linter) kept."""
from __future__ import annotations

import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
MAX_LINES = 450  # the project's own limit: one concern per module, read in one sitting


def test_no_module_in_align_is_past_the_line_limit():
    long = {str(p.relative_to(ROOT)): n for p in (ROOT / "align").rglob("*.py")
            if (n := len(p.read_text(encoding="utf-8").splitlines())) > MAX_LINES}
    assert not long, f"split these along a seam: {long}"


def test_the_import_contracts_hold():
    """Layers only look down, no cycles, pure modules free of model code (pyproject.toml)."""
    lint = Path(sys.executable).parent / "lint-imports"
    done = subprocess.run([str(lint), "--no-cache"], cwd=ROOT, capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stdout[-3000:] + done.stderr[-2000:]
    assert "0 broken" in done.stdout and "4 kept" in done.stdout
