"""`make demo` and `make test` started at once on a fresh clone must not race on creating .venv (issue 7 item 12).

The real set-up downloads packages; here `python3` is a stand-in on PATH that builds a fake venv whose `pip`
logs each call and sleeps, so two concurrent set-ups would overlap if nothing serialized them.
"""

from __future__ import annotations

import os
import shutil
import subprocess
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]

FAKE_PYTHON = """#!/bin/sh
# stand-in for 'python3 -m venv DIR': a venv whose pip logs start and end of each call around a pause
mkdir -p "$3/bin"
cat > "$3/bin/pip" <<'PIP'
#!/bin/sh
echo "start $$" >> "$PIP_LOG"
sleep 1
echo "end $$" >> "$PIP_LOG"
PIP
chmod +x "$3/bin/pip"
"""


@pytest.mark.skipif(not (shutil.which("make") and shutil.which("flock")), reason="needs make and flock")
def test_two_set_ups_started_at_once_do_not_overlap(tmp_path):
    shutil.copy(ROOT / "Makefile", tmp_path / "Makefile")
    (tmp_path / "pyproject.toml").write_text("[project]\nname = 'x'\n")
    bin_dir = tmp_path / "fakebin"
    bin_dir.mkdir()
    (bin_dir / "python3").write_text(FAKE_PYTHON)
    (bin_dir / "python3").chmod(0o755)
    log = tmp_path / "pip.log"
    env = {**os.environ, "PATH": f"{bin_dir}:{os.environ['PATH']}", "PIP_LOG": str(log)}
    runs = [subprocess.Popen(["make", "--no-print-directory", ".venv/.installed-stamp"], cwd=tmp_path, env=env,
                             stdout=subprocess.PIPE, stderr=subprocess.STDOUT) for _ in range(2)]
    outputs = [run.communicate(timeout=120)[0].decode() for run in runs]
    assert [run.returncode for run in runs] == [0, 0], outputs
    # One set-up ran (two pip calls: upgrade pip, then install the project), one after the other; the second
    # make waited for the lock, found the stamp fresh and installed nothing. Without the lock: four calls.
    lines = log.read_text().splitlines()
    assert [line.split()[0] for line in lines] == ["start", "end", "start", "end"]
    assert (tmp_path / ".venv" / ".installed-stamp").exists()
