"""The public API: ``import goalkit`` is light, every public name resolves, and the user-facing
texts (README, examples, notebooks, docs code blocks) use only ``goalkit``'s public names.

Code is read with :mod:`ast` (the Python grammar), notebooks with :mod:`json` (nbformat v4 is a
JSON document), and Markdown code blocks by their ```` ```python ```` fences (CommonMark).
"""

import ast
import json
import re
import subprocess
import sys
from pathlib import Path

import pytest

import goalkit

ROOT = Path(__file__).resolve().parents[1]
HEAVY = ("h5py", "faiss", "matplotlib", "dask", "distributed", "scipy", "sklearn", "tomlkit", "torch")


def test_import_goalkit_loads_no_heavy_dependency():
    code = ("import sys, goalkit; print(','.join(sorted(m for m in sys.modules "
            f"if m.split('.')[0] in {HEAVY!r})))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == ""
    # and using a light name loads only what it needs
    code = ("import sys, goalkit; goalkit.load_recipe; goalkit.RewardRule; "
            f"print(','.join(sorted(m for m in sys.modules if m.split('.')[0] in {HEAVY!r})))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == ""


def test_every_public_name_resolves_and_is_listed():
    assert len(goalkit.__all__) == len(set(goalkit.__all__))
    for name in goalkit.__all__:
        assert getattr(goalkit, name) is not None, name
    assert set(goalkit.__all__) <= set(dir(goalkit))
    for name in ("load_recipe", "build", "open_set", "verify", "GoalSampler", "open_logs", "scan", "tune",
                 "RewardRule", "Mixture", "PCA", "SFA", "Standardised", "Raw", "FrameEmbedding",
                 "Precomputed", "GoalkitError", "RecipeError", "LogError", "LayoutError", "DatasetError",
                 "EmbeddingError", "OutputError", "InProcess", "LocalWorkers", "DaskCluster"):
        assert name in goalkit.__all__, name
    with pytest.raises(AttributeError):
        goalkit.no_such_name


def test_errors_are_goalkit_errors():
    for name in goalkit.__all__:
        obj = getattr(goalkit, name)
        if isinstance(obj, type) and issubclass(obj, Exception):
            assert issubclass(obj, goalkit.GoalkitError), name


def test_tune_is_the_public_function_whatever_was_imported_before():
    import goalkit.thresholds.session  # noqa: F401  (the package goalkit.tune once was)
    from goalkit import tune
    from goalkit.api import tune as api_tune

    assert tune is goalkit.tune is api_tune and "goalkit.tune" not in sys.modules


def test_runner_arguments_are_checked():
    with pytest.raises(goalkit.GoalkitError, match="worker processes"):
        goalkit.LocalWorkers(0)
    with pytest.raises(goalkit.GoalkitError, match="expected a runner"):
        goalkit.build("no-such-recipe.toml", runner=2)
    assert goalkit.LocalWorkers(3).engine_arguments() == {"workers": 3}
    assert goalkit.DaskCluster("tcp://head:8786").engine_arguments() == {"scheduler": "tcp://head:8786"}
    assert goalkit.InProcess().engine_arguments() == {}


# ---- user-facing texts import only the public API ------------------------------------------
def private_imports(source: str) -> list[str]:
    """``goalkit.x`` modules that ``source`` (Python) imports, directly or with ``from``."""
    found = []
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, ast.Import):
            found += [a.name for a in node.names if a.name.startswith("goalkit.")]
        elif isinstance(node, ast.ImportFrom) and node.module and node.module.startswith("goalkit."):
            found.append(node.module)
    return found


def _python_blocks(markdown: str) -> list[str]:
    return re.findall(r"^```python[^\n]*\n(.*?)^```", markdown, flags=re.S | re.M)


def _texts():
    for p in sorted((ROOT / "examples").glob("*.py")):
        yield p.relative_to(ROOT), p.read_text()
    for p in sorted((ROOT / "notebooks").glob("*.ipynb")):
        cells = json.loads(p.read_text())["cells"]
        for i, c in enumerate(cells):
            if c["cell_type"] == "code":
                src = "".join(c["source"])
                yield f"{p.relative_to(ROOT)} cell {i}", "\n".join(
                    l for l in src.splitlines() if not l.lstrip().startswith(("%", "!")))
    for p in [ROOT / "README.md", *sorted((ROOT / "docs").glob("*.md"))]:
        for i, block in enumerate(_python_blocks(p.read_text())):
            yield f"{p.relative_to(ROOT)} block {i}", block


def test_readme_examples_notebooks_and_docs_use_only_the_public_api():
    texts = list(_texts())
    assert len(texts) >= 15   # examples, notebook cells and doc blocks were found
    bad = {where: mods for where, src in texts if (mods := private_imports(src))}
    assert bad == {}


def test_the_check_catches_private_imports():
    assert private_imports("from goalkit.pipeline.build import build") == ["goalkit.pipeline.build"]
    assert private_imports("import goalkit.write.reader as r\nimport goalkit") == ["goalkit.write.reader"]
    assert private_imports("import goalkit\nfrom goalkit import build") == []
    assert _python_blocks("x\n```python\nimport goalkit.api\n```\n") == ["import goalkit.api\n"]


def test_build_from_a_path_gives_the_same_bytes_with_each_local_runner(tmp_path):
    import hashlib

    demo = goalkit.make_demo(tmp_path / "demo", episodes=12, seed=5)
    digests = []
    for i, runner in enumerate([None, goalkit.InProcess(), goalkit.LocalWorkers(2)]):
        result = goalkit.build(demo["recipe"], runner=runner, out=tmp_path / f"set-{i}.h5")
        digests.append(hashlib.sha256(result.path.read_bytes()).hexdigest())
    assert len(set(digests)) == 1
    report = goalkit.verify(tmp_path / "set-0.h5")
    assert isinstance(report, goalkit.VerifyReport) and report.ok, report.failures
    assert goalkit.scan(demo["logs"], demo["layout"])["episodes"] == 12


def test_goalkit_help_loads_no_command_and_no_numpy():
    # the CLI loads a command's module only when that command runs (goalkit.cli.LazyGroup)
    code = ("import sys\nfrom goalkit.cli import main\n"
            "try:\n    main(['--help'])\nexcept SystemExit:\n    pass\n"
            "print(','.join(sorted(m for m in sys.modules if m.startswith('goalkit') or "
            "m.split('.')[0] in ('numpy', 'h5py', 'faiss', 'matplotlib', 'dask'))))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    loaded = out.stdout.strip().splitlines()[-1].split(",")
    assert loaded == ["goalkit", "goalkit.cli", "goalkit.cli_support", "goalkit.errors"]


def test_build_on_a_dask_cluster_by_client_and_by_address_gives_the_same_bytes(tmp_path):
    import hashlib

    distributed = pytest.importorskip("distributed")
    demo = goalkit.make_demo(tmp_path / "demo", episodes=12, seed=5)
    ref = goalkit.build(demo["recipe"], out=tmp_path / "ref.h5").path
    digest = lambda p: hashlib.sha256(p.read_bytes()).hexdigest()  # noqa: E731
    with distributed.LocalCluster(processes=False, protocol="tcp", n_workers=1, threads_per_worker=2,
                                  dashboard_address=None) as cluster, distributed.Client(cluster) as client:
        by_client = goalkit.build(demo["recipe"], runner=goalkit.DaskCluster(client), out=tmp_path / "c.h5")
        by_address = goalkit.build(demo["recipe"], runner=goalkit.DaskCluster(cluster.scheduler_address),
                                   out=tmp_path / "a.h5")
        assert client.status == "running"   # an existing client is used, not closed
    assert by_client.shards["total"] >= 1
    assert digest(by_client.path) == digest(by_address.path) == digest(ref)
