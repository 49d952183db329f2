"""Run the front end's unit tests (node --test with jsdom) as part of the one pytest command."""

from __future__ import annotations

import pathlib
import shutil
import subprocess

import pytest

JS = pathlib.Path(__file__).resolve().parent.parent / "js"


def test_js_unit_tests_pass():
    node = shutil.which("node")
    if node is None:
        pytest.fail("node is not installed: the JS unit tests need Node.js 20+ (apt-get install nodejs npm).")
    if not (JS / "node_modules" / "jsdom").exists():
        npm = shutil.which("npm")
        assert npm, "npm is needed to install the JS test dependencies (npm ci --prefix js)."
        subprocess.run([npm, "ci", "--prefix", str(JS)], check=True, capture_output=True, timeout=300)
    proc = subprocess.run(
        [node, "--test", "tests/"], cwd=JS, capture_output=True, text=True, timeout=300
    )
    summary = "\n".join(line for line in proc.stdout.splitlines() if line.startswith(("# ", "not ok")))
    assert proc.returncode == 0, f"node --test failed:\n{proc.stdout[-6000:]}\n{proc.stderr[-2000:]}"
    assert "# fail 0" in proc.stdout and "# pass " in proc.stdout, summary
