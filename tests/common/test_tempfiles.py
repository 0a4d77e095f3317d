"""Temporaries beside outputs: those of dead processes are swept, a live writer's are kept."""
import subprocess
import sys

from bigprune.common.tempfiles import sweep_temps


def test_sweep_removes_only_temporaries_of_processes_that_no_longer_run(tmp_path):
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()  # its pid now names no process (os.kill(pid, 0) raises ProcessLookupError)
    live = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    try:
        names = [f".picks.parquet.{dead.pid}.tmp", f".picks.json.{dead.pid}.tmp",
                 f".picks.parquet.{live.pid}.tmp", ".notes.tmp", "picks.parquet", f"picks.{dead.pid}.tmp"]
        for name in names:
            (tmp_path / name).write_text("x")
        sweep_temps(tmp_path)
        assert sorted(p.name for p in tmp_path.iterdir()) == sorted(
            [f".picks.parquet.{live.pid}.tmp", ".notes.tmp", "picks.parquet", f"picks.{dead.pid}.tmp"])
    finally:
        live.kill()
        live.wait()

