"""Progress display: shown on a terminal (a pseudo-terminal from the
standard ``pty`` module stands in for one), never in a pipe or a file,
never with the quiet option, never without tqdm, and never on standard
output (so ``--json`` stays strict JSON)."""

from __future__ import annotations

import fcntl
import os
import pty
import select
import struct
import subprocess
import sys
import termios
from pathlib import Path

import helpers as H
import pytest

from stablefilt import _progress

ROOT = Path(__file__).resolve().parent.parent

SNIPPET = """
import sys, time
from stablefilt import _progress
if "--quiet" in sys.argv:
    _progress.set_quiet(True)
with _progress.bar(4, "counting", unit="step") as b:
    for _ in range(4):
        time.sleep(0.7)  # above the bar's 0.5 s refresh interval
        b.update(1)
print("done")
"""


def _run_on_terminal(argv, timeout=120):
    """``(stdout, what a terminal on stderr saw, status)``: stderr goes to
    a pseudo-terminal (``pty.openpty``), stdout to a pipe."""
    master, slave = pty.openpty()
    # A terminal of 24 rows and 120 columns (TIOCSWINSZ; a bare pty has none).
    fcntl.ioctl(slave, termios.TIOCSWINSZ, struct.pack("HHHH", 24, 120, 0, 0))
    env = {**os.environ, "PYTHONPATH": str(ROOT), "COLUMNS": "120"}
    proc = subprocess.Popen(argv, stdout=subprocess.PIPE, stderr=slave, stdin=subprocess.DEVNULL, env=env,
                            cwd=str(ROOT))
    os.close(slave)
    seen = b""
    while True:
        ready, _, _ = select.select([master], [], [], timeout)
        if not ready:
            proc.kill()
            raise AssertionError("the command did not finish")
        try:
            chunk = os.read(master, 4096)
        except OSError:  # the child closed its end
            break
        if not chunk:
            break
        seen += chunk
    out = proc.stdout.read().decode()
    proc.wait(timeout)
    os.close(master)
    return out, seen.decode(errors="replace"), proc.returncode


def test_bar_shows_on_a_terminal_with_count_and_time():
    out, term, rc = _run_on_terminal([sys.executable, "-c", SNIPPET])
    assert rc == 0 and out == "done\n"
    assert "counting" in term and "3/4" in term
    assert "<" in term  # tqdm's elapsed<remaining time estimate


def test_bar_is_quiet_with_the_quiet_option_on_a_terminal():
    out, term, rc = _run_on_terminal([sys.executable, "-c", SNIPPET, "--quiet"])
    assert rc == 0 and out == "done\n"
    assert "counting" not in term


def test_bar_is_silent_in_a_pipe():
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    p = subprocess.run([sys.executable, "-c", SNIPPET], capture_output=True, text=True, env=env, timeout=120)
    assert p.returncode == 0 and p.stdout == "done\n"
    assert p.stderr == ""


def test_silent_without_tqdm(monkeypatch):
    monkeypatch.setitem(sys.modules, "tqdm", None)  # import tqdm now raises ImportError
    _progress.set_quiet(False)
    _progress.force_display(True)
    try:
        b = _progress.bar(3, "x")
    finally:
        _progress.force_display(None)
    assert isinstance(b, _progress._Silent)
    with b:
        b.update(2)
    assert b.n == 2


def test_forced_display_is_a_tqdm_bar_on_stderr(capsys):
    pytest.importorskip("tqdm", reason="the optional progress extra (tqdm) is not installed")
    _progress.set_quiet(False)  # as a command without --quiet leaves it
    _progress.force_display(True)
    try:
        with _progress.bar(2, "forced") as b:
            b.update(2)
    finally:
        _progress.force_display(None)
    out, err = capsys.readouterr()
    assert out == "" and "forced" in err and "0/2" in err


def test_training_shows_an_epoch_bar_on_a_terminal_and_epoch_lines_on_stdout(tmp_path):
    cfg = H.write(tmp_path / "tiny.toml", H.small_run_text(epochs=3))
    argv = [sys.executable, "-m", "stablefilt.cli", "train", cfg, "--out", str(tmp_path / "run")]
    out, term, rc = _run_on_terminal(argv, timeout=300)
    assert rc == 0, term
    assert "training" in term and "/3" in term and "epoch" in term
    assert "epoch   3/3" in out  # the epoch lines stay on stdout
    assert "training:" not in out  # no bar on stdout
    out, term, rc = _run_on_terminal(argv[:-1] + [str(tmp_path / "run2"), "--quiet"], timeout=300)
    assert rc == 0 and "training" not in term
