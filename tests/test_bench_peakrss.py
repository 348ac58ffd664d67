"""benchmarks/tools/peakrss.py: a case process reports its own peak, not its parent's.

Linux keeps the resident high-water mark across execve (getrusage(2), proc(5) VmHWM), so a
process started by a large parent reads that parent's peak through ru_maxrss. The check: a
parent holding 300 MiB starts a small interpreter; ru_maxrss there is at least the parent's
size, VmHWM is the child's own (well under 100 MiB for a bare interpreter with numpy).
"""

import importlib.util
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
TOOL = ROOT / "benchmarks" / "tools" / "peakrss.py"

CHILD = f"""
import importlib.util, json, resource
import numpy
spec = importlib.util.spec_from_file_location("peakrss", {str(TOOL)!r})
m = importlib.util.module_from_spec(spec); spec.loader.exec_module(m)
print(json.dumps([m.peak_rss_mb(), resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024]))
"""


def test_a_child_of_a_large_process_reports_its_own_peak():
    import json

    import numpy as np

    held = np.ones(300 * 2**20 // 8)          # 300 MiB resident in this process
    out = subprocess.run([sys.executable, "-c", CHILD], capture_output=True, text=True, check=True)
    own, maxrss = json.loads(out.stdout)
    assert held.sum() == held.size
    assert maxrss >= 300                       # the parent's peak, carried across execve
    assert own < 100                           # the child's own image


def test_the_peak_of_this_image_grows_with_what_it_touches():
    spec = importlib.util.spec_from_file_location("peakrss", TOOL)
    m = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(m)
    import numpy as np

    before = m.peak_rss_mb()
    block = np.ones(int(before + 64) * 2**20 // 8)   # more than the whole current peak, touched
    assert m.peak_rss_mb() >= before + 64
    del block
