"""A stopped command (Ctrl-C, or SIGTERM as batch schedulers send at a time limit) ends with one line, no temporary file."""

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

pytestmark = pytest.mark.skipif(os.name != "posix", reason="POSIX signals")


def _stop_demo(tmp_path, sig):
    out = tmp_path / "run"
    proc = subprocess.Popen([sys.executable, "-m", "envelope.cli.main", "demo", "--out", str(out)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=tmp_path)
    deadline = time.monotonic() + 120
    while not (out / "models").is_dir() and time.monotonic() < deadline and proc.poll() is None:
        time.sleep(0.2)  # the run has started writing
    time.sleep(1.0)
    proc.send_signal(sig)
    _, err = proc.communicate(timeout=120)
    return proc.returncode, err, out


@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGINT])
def test_stopped_run_says_so_in_one_line_and_leaves_no_temporary_file(tmp_path, sig):
    # Source: POSIX shells report a process ended by signal N as status 128 + N (IEEE Std 1003.1,
    # Shell Command Language 2.8.2); our contract: one line, nothing half-written
    code, err, out = _stop_demo(tmp_path, sig)
    if code == 0:
        pytest.skip("the demo finished before the signal arrived")
    assert code == 128 + int(sig), err[-2000:]
    lines = [ln for ln in err.strip().splitlines() if ln.strip()]
    assert lines[-1].startswith(f"Stopped by {signal.Signals(sig).name}: no half-written file is left")
    assert "Traceback" not in err and "leaked" not in err
    leftovers = [p for p in Path(out).rglob(".*") if ".part" in p.name]
    assert not leftovers, leftovers
