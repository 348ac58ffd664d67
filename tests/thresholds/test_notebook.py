"""notebooks/walkthrough.ipynb runs top to bottom (nbclient) and shows what it promises.

The kernel: a kernelspec named ``python3`` that starts *this* interpreter, put first on
``JUPYTER_PATH`` for the test, so the notebook runs in the same environment as pytest
whatever kernels the machine has installed (a fresh ``pip install -e ".[test]"`` venv has
ipykernel but possibly no registered kernelspec, or one pointing at another Python).
"""

import json
import sys
from pathlib import Path

import nbformat
from nbclient import NotebookClient

NOTEBOOK = Path(__file__).resolve().parents[2] / "notebooks" / "walkthrough.ipynb"


def _kernel_here(root: Path) -> None:
    spec = root / "kernels" / "python3"
    spec.mkdir(parents=True)
    (spec / "kernel.json").write_text(json.dumps({
        "argv": [sys.executable, "-m", "ipykernel_launcher", "-f", "{connection_file}"],
        "display_name": "Python 3 (test)", "language": "python"}))


def test_committed_notebook_has_no_outputs():
    nb = nbformat.read(NOTEBOOK, as_version=4)
    code = [c for c in nb.cells if c.cell_type == "code"]
    assert code and all(c.outputs == [] and c.execution_count is None for c in code)


def test_walkthrough_runs_and_shows_plots(tmp_path, monkeypatch):
    _kernel_here(tmp_path / "jupyter")
    monkeypatch.setenv("JUPYTER_PATH", str(tmp_path / "jupyter"))
    from jupyter_client.kernelspec import KernelSpecManager

    assert KernelSpecManager().get_kernel_spec("python3").argv[0] == sys.executable
    nb = nbformat.read(NOTEBOOK, as_version=4)
    client = NotebookClient(nb, kernel_name="python3", timeout=120, allow_errors=False,
                            resources={"metadata": {"path": str(tmp_path)}})
    client.execute()  # raises CellExecutionError naming the failing cell
    outputs = [o for c in nb.cells if c.cell_type == "code" for o in c.outputs]
    assert not [o for o in outputs if o.output_type == "error"]
    images = [o for o in outputs if "image/png" in o.get("data", {})]
    assert len(images) == 4
    text = "".join(o.get("text", "") for o in outputs if o.output_type == "stream")
    assert "NO LABELS USED" in text and "suggested:" in text and "consistent:" in text
    assert "rewarded share of training rows" in text
    assert "held-out pairs from" in text and "not a substitute for supervised trials on the machine" in text
