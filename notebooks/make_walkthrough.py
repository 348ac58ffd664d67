"""Write notebooks/walkthrough.ipynb (without outputs) from the cells below.

Run ``python notebooks/make_walkthrough.py`` after editing a cell; commit both files.
"""

from pathlib import Path

import nbformat
from nbformat.v4 import new_code_cell, new_markdown_cell, new_notebook

CELLS = [
    ("md", """# From task logs to a tuned goal-conditioned dataset

This walk-through runs goalkit end to end on the invented irrigation-gantry demo: a nozzle head
moves in x-y-z over a seedling bench and pushes trays along it. We

1. write the demo logs and **scan** them,
2. **tune** the goal-match threshold -- first without labels, then with the logs' own success
   flags -- and write a tuned copy of the recipe,
3. **build** the dataset from the tuned recipe and **verify** it against the logs,
4. **read batches** of (observation, action, goal, reward) rows for training,
5. draw a **held-out goal suite** and **assess** two toy checkpoints on it, offline.

Python calls and `goalkit` commands are mixed; every command also has a Python function."""),
    ("code", """import json
import subprocess
import sys
import tempfile
from pathlib import Path

from IPython.display import Image, display

import goalkit

work = Path(tempfile.mkdtemp(prefix="goalkit-walkthrough-"))
demo = goalkit.make_demo(work, episodes=200, seed=0)
recipe_path = Path(demo["recipe"])
print(json.dumps(demo, indent=1))


def command(*args):
    \"\"\"Run a goalkit command in a subprocess, print what it says, return the result.\"\"\"
    res = subprocess.run([sys.executable, "-m", "goalkit.cli", *map(str, args)],
                         capture_output=True, text=True)
    print(res.stdout + res.stderr)
    return res"""),
    ("md", """## 1. Scan the logs

`goalkit scan` reads the logs chunk by chunk with the layout file and reports what it found:
keys, episode lengths, the range of every observation dimension, success by task."""),
    ("code", """res = command("scan", demo["logs"], "--layout", demo["layout"])
assert res.returncode == 0"""),
    ("md", """## 2. Tune the threshold

The demo recipe rewards a goal row when the reached goal `phi(s_{t+1})` is within 0.04 m
(euclidean, in the goal space of head position and tray centres) of the goal. Is that a
good threshold? First, **without labels**: goalkit describes how far goals move in a step
and after `h` steps, how close other episodes come, and which share of each strategy's
rows a threshold would reward. This puts the threshold in proportion but cannot say which
value is right."""),
    ("code", """recipe = goalkit.load_recipe(recipe_path)
plain = goalkit.tune(recipe)
print(plain.render())
plots = plain.write_plots(work / "plots-no-labels")
for name in ("goal-step-displacement.png", "goal-rewarded-fraction.png"):
    display(Image(filename=str(work / "plots-no-labels" / name)))"""),
    ("md", """Now **with labels**: each logged transition is a pair (reached goal, the task's goal)
labelled by the log's success flag. We let two distances compete; every distinct distance is
a candidate threshold, `max-f1` picks one, and a bootstrap over episodes gives its interval."""),
    ("code", """tuned = goalkit.tune(recipe, from_success=True, distances=["euclidean", "l1"], n_resamples=200)
report = tuned.as_dict()
print(tuned.render())
tuned.write_plots(work / "plots")
prefix = "" if len(tuned.candidates) == 1 else f"{tuned.recipe_distance()}-"
for name in ("threshold-roc.png", "threshold-f1.png"):
    display(Image(filename=str(work / "plots" / f"{prefix}{name}")))"""),
    ("md", """Read the table with care: the chosen threshold is smaller than the demo's 0.04 m
watering radius. The success flag of a watering task fires only after the head has stayed
within 0.04 m for three states, so the states inside the radius before that are labelled
*not reached*; and for the slide tasks the head part of the goal is only a natural end pose.
Labels from success flags are only as good as the flags. Here we take the suggestion to see
the whole flow; with real labels (`--labels pairs.csv`) the same steps apply."""),
    ("md", """Write a copy of the recipe with the chosen threshold (and distance, if the other one
won). Only those values change; the comments stay. The same from the command line:
`goalkit tune RECIPE --from-success --write-recipe tuned.toml`."""),
    ("code", """tuned_path = work / "gantry-recipe-tuned.toml"
edit = goalkit.write_tuned_recipe(recipe, tuned_path, threshold=tuned.recipe_threshold(),
                          distance=tuned.recipe_distance(), note="goalkit tune: max-f1 on success flags")
print("; ".join(edit.changes))
text = tuned_path.read_text()
print(text[text.index("[reward]"):text.index("[split]")])
assert goalkit.load_recipe(tuned_path).reward.threshold == tuned.recipe_threshold()"""),
    ("md", """## 3. Build and verify

`goalkit build` relabels every transition with the recipe's mixture of strategies and scores
each (transition, goal) row with the tuned rule; `goalkit verify` re-derives every row from the
logs and checks the stored checksums."""),
    ("code", """dataset = work / "gantry-goals-tuned.h5"
res = command("build", tuned_path, "--out", dataset)
assert res.returncode == 0
res = command("verify", dataset)
assert res.returncode == 0, "verify found a problem\""""),
    ("md", """## 4. Read batches

A built set is one HDF5 file; `goalkit.open_set(path).batches` yields dictionaries of numpy arrays, shuffled
in bounded memory when asked."""),
    ("code", """import numpy as np

with goalkit.open_set(dataset) as gs:
    print("rows:", gs.rows("train"), "train,", gs.rows("validation"), "validation")
    batch = next(gs.batches("train", batch_size=256, shuffle=True, seed=1))
    for key in ("observation", "action", "goal", "reward", "strategy"):
        print(f"{key:12s} {batch[key].dtype} {batch[key].shape}")
    rewards = np.concatenate([b["reward"] for b in gs.batches("train", 4096, columns=["reward"])])
print(f"rewarded share of training rows: {rewards.mean():.1%} "
      f"(tune predicted {report['rewarded_fraction']['all']['fraction']['suggested']:.1%} over all rows)")"""),
    ("md", """## 5. A held-out goal suite and an offline check of two toy checkpoints

The validation split holds whole episodes training never saw. `goalkit.make_suite` (or
`goalkit suite DATASET --out SUITE`) draws held-out (state, goal, horizon, reachable) pairs from
it, stratified by steps-to-goal, by distance to the nearest training goal, and by whether the
pair's own episode reaches the goal or only several held-out episodes joined do. Its card says
how (docs/suites.md)."""),
    ("code", """suite = goalkit.make_suite(dataset, work / "gantry-suite.h5", per_cell=50, seed=0)
print(f"{suite.rows} held-out pairs from {suite.counts['episodes']} episodes")
for cell in suite.counts["cells"]:
    print(f"  {cell['route']:<8} {cell['bucket']:<12} {cell['proximity']:<4} {cell['rows']:>4} rows")"""),
    ("md", """Two toy checkpoints, trained here on the CPU in well under a second: a behaviour-cloning
linear fit of the action (and of negative steps-to-goal, as a value) on [observation, goal, 1]
with numpy's least squares, and a random linear map. `goalkit.assess` takes checkpoints as entry
points `module:callable` and imports only the modules named, so they are saved as a small
module. The scores are **offline proxies**, not a substitute for supervised trials on the
machine."""),
    ("code", """with goalkit.open_set(dataset) as gs:
    tr = gs.read("train", ["observation", "goal", "action", "steps_to_goal"])
x = np.hstack([tr["observation"], tr["goal"], np.ones((len(tr["goal"]), 1))]).astype(np.float64)
later = tr["steps_to_goal"] > 0
rand = np.random.default_rng(0)
weights = {"bc_policy": np.linalg.lstsq(x, tr["action"].astype(np.float64), rcond=None)[0],
           "bc_value": np.linalg.lstsq(x[later], -tr["steps_to_goal"][later].astype(np.float64), rcond=None)[0]}
weights["random_policy"] = rand.normal(size=weights["bc_policy"].shape) * 0.1
weights["random_value"] = rand.normal(size=weights["bc_value"].shape)
ckpts = work / "ckpts"
ckpts.mkdir(exist_ok=True)
np.savez(ckpts / "toy_weights.npz", **weights)
(ckpts / "walkthrough_ck.py").write_text(
    "from pathlib import Path\\n"
    "import numpy as np\\n"
    "W = np.load(Path(__file__).with_name('toy_weights.npz'))\\n"
    "def _x(b):\\n"
    "    return np.hstack([b['observation'], b['goal'], np.ones((len(b['goal']), 1))]).astype(np.float64)\\n"
    "def bc_policy(b): return _x(b) @ W['bc_policy']\\n"
    "def random_policy(b): return _x(b) @ W['random_policy']\\n"
    "def bc_value(b): return _x(b) @ W['bc_value']\\n"
    "def random_value(b): return _x(b) @ W['random_value']\\n")
assessed = goalkit.assess(dataset, suite.path, import_path=ckpts, resamples=500,
                          policies=["walkthrough_ck:bc_policy", "walkthrough_ck:random_policy"],
                          values=["walkthrough_ck:bc_value", "walkthrough_ck:random_value"])
print(assessed.render())
print("plots:", ", ".join(p.name for p in assessed.write_plots(work / "assess-plots")))"""),
]


def build_notebook() -> nbformat.NotebookNode:
    """The walk-through notebook, without outputs."""
    cells = [new_markdown_cell(src) if kind == "md" else new_code_cell(src) for kind, src in CELLS]
    for i, cell in enumerate(cells):  # stable ids, so regenerating gives the same file
        cell["id"] = f"walkthrough-{i:02d}"
    nb = new_notebook(cells=cells)
    nb.metadata["kernelspec"] = {"name": "python3", "display_name": "Python 3", "language": "python"}
    nb.metadata["language_info"] = {"name": "python"}
    return nb


if __name__ == "__main__":
    out = Path(__file__).with_name("walkthrough.ipynb")
    nbformat.write(build_notebook(), out)
    print(f"wrote {out}")
