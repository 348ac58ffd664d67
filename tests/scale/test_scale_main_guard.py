"""A script that builds with local workers but has no ``if __name__ == "__main__":`` guard.

Each worker of the fork server (or spawn) start method imports the script that started the
build (Python's multiprocessing documentation, "Safe importing of main module"), so an unguarded
build runs again inside every worker while it starts, and the workers die before taking a task.
The coordinator's one-line error must say so, not suggest a kill or a lack of memory.
"""

import shutil
import subprocess
import sys

SCRIPT = """import goalkit
goalkit.build("scale-recipe.toml", runner=goalkit.LocalWorkers(2), card=False)
"""


def test_an_unguarded_script_is_told_about_the_guard(gantry, tmp_path):
    for name in ("gantry-logs.h5", "gantry-layout.toml", "scale-recipe.toml"):
        shutil.copy(gantry / name, tmp_path / name)
    (tmp_path / "unguarded.py").write_text(SCRIPT, encoding="utf-8")
    proc = subprocess.run([sys.executable, "unguarded.py"], cwd=tmp_path, capture_output=True, text=True,
                          timeout=300)
    assert proc.returncode != 0
    lines = [ln for ln in proc.stderr.splitlines() if ln.startswith("goalkit.pipeline.shardfiles.ShardError:")]
    assert lines, proc.stderr[-3000:]
    outer = lines[-1]     # the script's own build (the workers' nested builds print theirs first)
    assert "a worker process died while starting" in outer
    assert "(unguarded.py)" in outer and 'if __name__ == "__main__":' in outer
    assert "out of memory" not in outer
    assert not (tmp_path / "scale-goals.h5").exists()
