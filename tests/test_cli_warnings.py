"""Warnings reach a command-line user as one plain line each, without mpcproto's source lines."""

import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def _rounding_copy(tmp_path):
    """The Wood & Berry study asking its controllers to round dead times (`dead_time = "round"`)."""
    text = (ROOT / "scenarios" / "wood_berry_column.toml").read_text()
    text = text.replace("[scenario]\n", '[scenario]\ndead_time = "round"\n', 1)
    path = tmp_path / "wood_berry_round.toml"
    path.write_text(text)
    return path


def test_rounded_dead_times_are_reported_once_as_plain_lines(tmp_path):
    # Wood & Berry's feed dead times (8.1 and 3.4 min) are not whole samples of 1 min; asked to
    # round them, the linearization says so (the rounding policy documented in mpcproto.linear).
    proc = subprocess.run(
        [sys.executable, "-m", "mpcproto.cli", "linearize", str(_rounding_copy(tmp_path))],
        capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    lines = [ln for ln in proc.stderr.splitlines() if ln.strip()]
    assert any("mpcproto linearize: warning: the dead time on 'feed' = 8.1" in ln for ln in lines)
    assert "UserWarning" not in proc.stderr and ".py:" not in proc.stderr
    assert len(lines) == len(set(lines)), "each distinct warning is shown once"


def test_exact_dead_times_need_no_warning():
    # the default represents the fractional feed dead times exactly: nothing to warn about
    proc = subprocess.run(
        [sys.executable, "-m", "mpcproto.cli", "linearize", str(ROOT / "scenarios" / "wood_berry_column.toml")],
        capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    assert "dead time" not in proc.stderr
