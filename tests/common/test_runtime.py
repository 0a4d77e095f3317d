"""Progress: bars on a terminal, a plain line per loop in a log, nothing under --quiet.

The terminal is a pseudo-terminal (the standard library's ``pty.openpty``) left at its initial
size of 0 x 0, as a terminal that never reports a size: tqdm reads it as no room and drew nothing,
which kept every stage silent.
"""
import os
import pty
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]


def _on_a_terminal(*args):
    """Run ``bigprune ARGS`` with stdout and stderr on a pseudo-terminal; return what it showed."""
    leader, follower = pty.openpty()
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    proc = subprocess.Popen([sys.executable, "-m", "bigprune", *args], stdin=subprocess.DEVNULL,
                            stdout=follower, stderr=follower, env=env)
    os.close(follower)
    shown = b""
    while True:
        try:
            chunk = os.read(leader, 65536)
        except OSError:  # the follower side closed: the process is gone
            break
        if not chunk:
            break
        shown += chunk
    os.close(leader)
    assert proc.wait() == 0, shown.decode(errors="replace")
    return shown.decode(errors="replace")


def test_a_terminal_shows_bars_and_quiet_hides_them(small_store):
    shown = _on_a_terminal("propagate", "--store", str(small_store.path), "--hops", "2")
    # tqdm's bar: "desc: NN%|...| n/total [elapsed<remaining, rate]", redrawn after a carriage return
    assert "\rpropagate hop 1/2:" in shown and "100%|" in shown, shown
    assert "\rpagerank:" in shown, shown
    quiet = _on_a_terminal("propagate", "--store", str(small_store.path), "--hops", "3", "--quiet")
    assert "propagate hop" not in quiet and "%|" not in quiet, quiet


def test_a_log_gets_one_plain_line_per_loop(small_store):
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    run = subprocess.run([sys.executable, "-m", "bigprune", "propagate", "--store", str(small_store.path),
                          "--hops", "2"], capture_output=True, text=True, env=env)
    assert run.returncode == 0, run.stderr
    lines = run.stderr.splitlines()
    assert [line.split(":")[0] for line in lines] == ["propagate hop 1/2", "propagate hop 2/2", "pagerank"]
    assert lines[0].startswith("propagate hop 1/2: 300 row(s) in ") and "\r" not in run.stderr
    quiet = subprocess.run([sys.executable, "-m", "bigprune", "propagate", "--store", str(small_store.path),
                            "--hops", "3", "--quiet"], capture_output=True, text=True, env=env)
    assert quiet.returncode == 0 and quiet.stderr == ""


def test_nested_loops_write_only_the_outer_line(capsys, monkeypatch):
    from bigprune.common import runtime

    monkeypatch.setitem(runtime._QUIET, "value", False)  # an earlier test's --quiet stays set

    with runtime.progress(total=2, desc="outer", unit="cell") as outer:
        for _ in range(2):
            with runtime.progress(total=5, desc="inner", unit="row") as inner:
                inner.update(5)
            outer.update(1)
    err = capsys.readouterr().err
    assert err.startswith("outer: 2 cell(s) in ") and err.count("\n") == 1, err


def test_a_failed_loop_writes_no_line(capsys, monkeypatch):
    from bigprune.common import runtime

    monkeypatch.setitem(runtime._QUIET, "value", False)

    with pytest.raises(ValueError):
        with runtime.progress(total=3, desc="doomed") as bar:
            bar.update(1)
            raise ValueError("stop")
    assert capsys.readouterr().err == ""
