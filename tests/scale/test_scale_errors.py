"""Failures of a scaled-out build: one line naming the shard, exit 2, finished shards kept."""

import fcntl
import json
import re
import resource
import shutil
import subprocess

import h5py
import numpy as np
import pytest
from click.testing import CliRunner

from goalkit.cli import main
from goalkit.errors import DatasetError
from goalkit.pipeline.build import build
from goalkit.pipeline.buildfolder import folder_of
from goalkit.pipeline.recipe import load_recipe

from conftest import GOALKIT, RECIPE, sha256

#: Same-episode strategies only, so planning reads one episode and the bad values are met by a worker.
LOCAL_RECIPE = RECIPE.replace("other_episode = 1\n", "")


def test_bad_values_in_a_worker_name_the_shard_and_episode(gantry, tmp_path):
    for name in ("gantry-logs.h5", "gantry-layout.toml"):
        shutil.copy(gantry / name, tmp_path / name)
    (tmp_path / "r.toml").write_text(LOCAL_RECIPE.format(seed=3), encoding="utf-8")
    with h5py.File(tmp_path / "gantry-logs.h5", "r+") as f:
        f["bench/ep_00150/head"][2, 0] = np.nan
    out = tmp_path / "scale-goals.h5"
    res = CliRunner().invoke(main, ["build", str(tmp_path / "r.toml"), "--workers", "2", "--chunk-rows", "1000",
                                    "--quiet"])
    assert res.exit_code == 2
    line = res.output.strip()
    assert "\n" not in line and "Traceback" not in line
    found = re.search(r"shard (\d+) \(episodes (\d+)\.\.(\d+)\)", line)
    assert found, line
    assert int(found.group(2)) <= 150 <= int(found.group(3))
    assert "episode 150" in line and "step 2" in line and "expected finite values" in line
    assert not out.exists()
    # the shards finished before the failure are kept for the next run
    assert len(list(folder_of(out).glob("shard-*.npz"))) >= 1


def _limit_file_size(nbytes):
    def apply():
        resource.setrlimit(resource.RLIMIT_FSIZE, (nbytes, resource.RLIM_INFINITY))
    return apply


def test_file_size_limit_stops_the_build_and_the_rerun_completes(gantry, reference, tmp_path):
    # RLIMIT_FSIZE (POSIX setrlimit) makes writes past the limit fail with EFBIG, as a full disk would.
    _, ref_digest = reference
    out = tmp_path / "scale-goals.h5"
    cmd = [GOALKIT, "build", str(gantry / "scale-recipe.toml"), "--out", str(out), "--workers", "2",
           "--chunk-rows", "1000", "--quiet", "--json"]
    # 1. a limit below one shard file (larger shards here) but above the workers' payload file
    #    (about 0.3 MB, written by the coordinator first): the first shard the workers write fails
    big = [a if a != "1000" else "20000" for a in cmd]
    res = subprocess.run(big, capture_output=True, text=True, timeout=120, preexec_fn=_limit_file_size(1_000_000))
    assert res.returncode == 2, res.stderr
    line = res.stderr.strip()
    assert "\n" not in line and re.search(r"shard \d+ \(episodes \d+\.\.\d+\): cannot write its shard file "
                                          r"\(File too large\)", line), line
    # 2. shards fit, the dataset does not: the coordinator's write fails, every finished shard stays
    res = subprocess.run(cmd, capture_output=True, text=True, timeout=120, preexec_fn=_limit_file_size(1_000_000))
    assert res.returncode == 2, res.stderr
    line = res.stderr.strip()
    assert "\n" not in line and "cannot write the dataset (File too large)" in line, line
    kept = len(list(folder_of(out).glob("shard-*.npz")))
    assert kept >= 1 and not out.exists()
    assert not list(tmp_path.glob(".scale-goals.h5~goalkit-*"))
    # 3. without the limit the same command resumes and gives the uninterrupted build's bytes
    res = subprocess.run(cmd, capture_output=True, text=True, timeout=120)
    assert res.returncode == 0, res.stderr
    assert json.loads(res.stdout)["shards"]["reused"] >= kept
    assert sha256(out) == ref_digest


def test_a_second_build_of_the_same_output_is_refused(gantry, tmp_path):
    out = tmp_path / "scale-goals.h5"
    folder = folder_of(out)
    folder.mkdir()
    with open(folder / "lock", "a+") as held:
        fcntl.flock(held.fileno(), fcntl.LOCK_EX)
        with pytest.raises(DatasetError, match="another build of this output is running"):
            build(load_recipe(gantry / "scale-recipe.toml").with_overrides(out=out), workers=1)
    assert not out.exists()
