"""Every compression a build writes gives the same bytes from every producer and chunk size;
lzf, whose bytes are not reproducible, is refused for writing but still read and verified.

Files are compared by SHA-256 (FIPS 180-4) of their whole bytes, as in test_scale_identity.py.
"""

import dataclasses

import pytest
from click.testing import CliRunner

from goalkit import open_set, verify
from goalkit.cli import main
from goalkit.pipeline.build import build
from goalkit.pipeline.recipe import COMPRESSIONS, STORED_ONLY_COMPRESSIONS, load_recipe

from conftest import sha256


@pytest.mark.parametrize("compression", COMPRESSIONS)
def test_every_producer_and_chunk_size_gives_one_file(gantry, tmp_path, compression):
    distributed = pytest.importorskip("distributed")
    text = (gantry / "scale-recipe.toml").read_text().replace("chunk_rows = 512",
                                                             f'chunk_rows = 512\ncompression = "{compression}"')
    recipe_file = gantry / f"scale-{compression}.toml"
    recipe_file.write_text(text, encoding="utf-8")
    out = tmp_path / "set.h5"  # one output path: its name is part of the stored recipe
    recipe = load_recipe(recipe_file).with_overrides(out=out)
    digests = {}
    for rows in (1_000_000, 3000):
        build(recipe, max_rows_per_chunk=rows, replace=True)
        digests[f"in process, {rows} rows"] = sha256(out)
    for rows in (5000, 12_000):  # --workers 2 --chunk-rows 5000 once differed with lzf
        build(recipe, workers=2, max_rows_per_chunk=rows, replace=True)
        digests[f"2 workers, {rows} rows"] = sha256(out)
    with distributed.LocalCluster(processes=False, n_workers=1, threads_per_worker=2,
                                  dashboard_address=None) as cluster, distributed.Client(cluster) as client:
        build(recipe, client=client, max_rows_per_chunk=4000, replace=True)
        digests["Dask, 4000 rows"] = sha256(out)
    assert len(set(digests.values())) == 1, digests


def test_a_recipe_asking_for_lzf_gets_one_line_and_exit_2(gantry, tmp_path):
    assert STORED_ONLY_COMPRESSIONS == ("lzf",)
    text = (gantry / "scale-recipe.toml").read_text().replace("chunk_rows = 512", 'chunk_rows = 512\ncompression = "lzf"')
    recipe_file = gantry / "scale-lzf.toml"
    recipe_file.write_text(text, encoding="utf-8")
    out = tmp_path / "set.h5"
    res = CliRunner().invoke(main, ["build", str(recipe_file), "--out", str(out)])
    assert res.exit_code == 2
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in res.stderr
    assert lines[0].startswith(f"goalkit: error: {recipe_file}: key output.compression: lzf is not written")
    assert "not" in lines[0] and 'use compression = "gzip"' in lines[0] and '"none"' in lines[0]
    assert not out.exists()


def test_a_set_written_with_lzf_stays_readable_and_verifiable(gantry, reference, tmp_path):
    # written as goalkit wrote lzf sets before it refused them: the writer still knows the filter
    ref, _ = reference
    text = (gantry / "scale-recipe.toml").read_text().replace("chunk_rows = 512", 'chunk_rows = 512\ncompression = "lzf"')
    (gantry / "old-lzf.toml").write_text(text, encoding="utf-8")
    gzip_recipe = load_recipe(gantry / "scale-recipe.toml")
    lzf_recipe = dataclasses.replace(gzip_recipe, text=text, file=str(gantry / "old-lzf.toml"),
                                     output=dataclasses.replace(gzip_recipe.output, compression="lzf",
                                                                path=tmp_path / "old.h5"))
    build(lzf_recipe)
    with open_set(tmp_path / "old.h5") as old, open_set(ref) as new:
        assert old.file["train/goal"].compression == "lzf"
        for split in ("train", "validation"):
            for name in ("goal", "reward", "source_episode", "strategy"):
                assert (old.read(split, [name])[name] == new.read(split, [name])[name]).all()
    report = verify(tmp_path / "old.h5")
    assert report.ok, report.failures
