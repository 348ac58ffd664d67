"""Build speed on a folder of per-episode ``.npz`` files, against a numpy script and a plain read.

    .venv/bin/python benchmarks/bench_perfile.py                 # 4,250 files, about 200k transitions
    .venv/bin/python benchmarks/bench_perfile.py --large         # also 21,000 files, about 1M

Logs: the demo's grouped logs of bench_grouped.py (``goalkit.demo.make_demo``), written again
as one ``np.savez`` file per episode (the same seven arrays, plus ``task``), untimed; layout
``shape = "per-file"``. Recipe: the demo's own, pointed at the folder (5 goals per transition,
gzip set).

Cases, each a fresh process, in one run:

* ``build``: ``goalkit.build`` of the recipe, one process;
* ``script``: the numpy script of bench_grouped.py (:func:`bench_grouped.relabel_blocks`: the
  same mixture, reward and columns, gzip), reading each file with ``np.load``;
* ``read``: ``np.load`` of every file and every array in it: the floor of any reader.

Reported: wall and CPU seconds (CPU: the process and its finished children), peak RSS, the speed
ratios build / script and build / read (``t_other / t_build``; above 1 the build is faster), and
the load average before and after (a shared 2-core machine: compare ratios within one run).
Results: ``benchmarks/results/perfile.json``.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(HERE))

from tools.bytecode import compile_package  # noqa: E402

from bench_grouped import EPISODES_PER_BLOCK, SIZES, cpu_seconds, logs, peak_rss_mb, relabel_blocks  # noqa: E402

KEYS = ("head", "head_velocity", "trays", "action", "reward", "success", "task_goal")


def per_file_logs(folder: Path, episodes: int) -> dict:
    """The demo's logs of ``episodes`` episodes as a per-file folder with its layout and recipe
    (reused when an earlier run wrote the same size)."""
    marker = folder / "perfile-logs.json"
    if marker.exists():
        info = json.loads(marker.read_text())
        if info.get("episodes") == episodes:
            return info
    import h5py
    import numpy as np

    grouped = logs(folder / "grouped", episodes)
    files = folder / "episodes"
    files.mkdir(parents=True, exist_ok=True)
    with h5py.File(grouped["logs"], "r") as f:
        for name in sorted(f["bench"].keys()):
            g = f["bench"][name]
            np.savez(files / f"{name}.npz", **{k: g[k][()] for k in KEYS}, task=np.int64(g.attrs["task"]))
    layout = Path(grouped["layout"]).read_text().replace('shape = "grouped"', 'shape = "per-file"')
    layout = layout.replace('episode_groups = "bench/*"', 'file_pattern = "*.npz"')
    (folder / "perfile-layout.toml").write_text(layout)
    recipe = Path(grouped["recipe"]).read_text()
    recipe = recipe.replace('path = "gantry-logs.h5"', f'path = "{files}"')
    recipe = recipe.replace('layout = "gantry-layout.toml"', f'layout = "{folder / "perfile-layout.toml"}"')
    recipe = recipe.replace('path = "gantry-goals.h5"', 'path = "perfile-goals.h5"')
    (folder / "perfile-recipe.toml").write_text(recipe)
    info = {"episodes": episodes, "steps": grouped["steps"], "threshold": grouped["threshold"],
            "folder": str(files), "recipe": str(folder / "perfile-recipe.toml")}
    marker.write_text(json.dumps(info))
    return info


def file_names(folder: str) -> list:
    return sorted(os.path.join(folder, n) for n in os.listdir(folder) if n.endswith(".npz"))


def script_case(folder: str, out: str, threshold: float) -> dict:
    """bench_grouped's numpy script, each episode read with ``np.load``."""
    import numpy as np

    names = file_names(folder)

    def blocks():
        for b in range(0, len(names), EPISODES_PER_BLOCK):
            obs, act, rew, tgoal = [], [], [], []
            for name in names[b:b + EPISODES_PER_BLOCK]:
                with np.load(name) as z:
                    obs.append(np.concatenate([z["head"], z["head_velocity"], z["trays"]], axis=1))
                    act.append(z["action"])
                    rew.append(z["reward"])
                    tgoal.append(z["task_goal"])
            yield b, obs, act, rew, tgoal

    return relabel_blocks(blocks(), out, threshold)


def read_case(folder: str) -> dict:
    """``np.load`` of every array of every file."""
    import numpy as np

    values = 0
    for name in file_names(folder):
        with np.load(name) as z:
            for key in (*KEYS, "task"):
                values += z[key].size
    return {"values_read": values}


def build_case(recipe: str, out: str) -> dict:
    import goalkit

    res = goalkit.build(recipe, out=out, card=False)
    return {"rows": int(sum(res.summary["rows"].values()))}


def child(args) -> None:
    c0, t0 = cpu_seconds(), time.perf_counter()
    info = json.loads(Path(args.info).read_text())
    if args.case == "script":
        res = script_case(info["folder"], args.out, info["threshold"])
    elif args.case == "read":
        res = read_case(info["folder"])
    else:
        res = build_case(info["recipe"], args.out)
    res.update(seconds=time.perf_counter() - t0, cpu_seconds=cpu_seconds() - c0, **peak_rss_mb())
    print(json.dumps(res))


def run(case: str, info: str, out: str) -> dict:
    Path(out).unlink(missing_ok=True)
    proc = subprocess.run([sys.executable, __file__, "--child", "--case", case, "--info", info, "--out", out],
                          capture_output=True, text=True, cwd=str(ROOT), env={**os.environ, "PYTHONPATH": str(ROOT)})
    Path(out).unlink(missing_ok=True)
    if proc.returncode:
        raise RuntimeError(f"benchmark case {case} failed:\n{proc.stderr[-4000:]}")
    return json.loads(proc.stdout.strip().splitlines()[-1])


def measure(label: str, folder: Path, episodes: int) -> dict:
    info = per_file_logs(folder, episodes)
    marker = str(folder / "perfile-logs.json")
    out = str(folder / "perfile-out.h5")
    result = {"episodes": episodes, "transitions": info["steps"], "load_average_before": os.getloadavg()}
    cases = {}
    for name in ("read", "build", "script"):
        cases[name] = r = run(name, marker, out)
        print(f"{label:>5} {name:<7} wall {r['seconds']:7.2f} s  cpu {r['cpu_seconds']:7.2f} s  "
              f"peak RSS {r['peak_rss_mb']:6.0f} MiB", flush=True)
    b, s, f = cases["build"], cases["script"], cases["read"]
    ratios = {"build_speed_over_script_wall": s["seconds"] / b["seconds"],
              "build_speed_over_script_cpu": s["cpu_seconds"] / b["cpu_seconds"],
              "build_speed_over_read_wall": f["seconds"] / b["seconds"]}
    print(f"{label:>5} build speed / script: {ratios['build_speed_over_script_wall']:.2f}x wall, "
          f"{ratios['build_speed_over_script_cpu']:.2f}x CPU; / plain read: "
          f"{ratios['build_speed_over_read_wall']:.2f}x", flush=True)
    result.update(cases=cases, ratios=ratios, load_average_after=os.getloadavg())
    return result


def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0],
                                 formatter_class=argparse.ArgumentDefaultsHelpFormatter)
    ap.add_argument("--large", action="store_true", help="also measure 21,000 files (about 1M transitions)")
    ap.add_argument("--data", default="/tmp/goalkit-bench-perfile", help="folder for generated logs")
    ap.add_argument("--out", default=str(HERE / "results" / "perfile.json"))
    ap.add_argument("--child", action="store_true", help=argparse.SUPPRESS)
    ap.add_argument("--case", help=argparse.SUPPRESS)
    ap.add_argument("--info", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        child(args)
        return {}
    bytecode = compile_package()     # as an installed copy has it (see tools/bytecode.py)
    report = {"benchmark": "perfile",
              "command": "python benchmarks/bench_perfile.py " + " ".join(argv if argv is not None else sys.argv[1:]),
              "machine": {"cpus": os.cpu_count(), "python": platform.python_version()},
              "bytecode": bytecode,
              "note": "shared 2-core machine: compare ratios within one run and CPU seconds",
              "sizes": {}}
    for label in ["200k"] + (["1M"] if args.large else []):
        report["sizes"][label] = measure(label, Path(args.data) / label, SIZES[label])
    out = Path(args.out)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(json.dumps(report, indent=2) + "\n")
    print(f"results: {out}")
    return report


if __name__ == "__main__":
    main()
