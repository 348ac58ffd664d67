"""The dataset card and ``goalkit info``: every number against the set's own columns.

Outside references: the card's Markdown is rendered to HTML by Python-Markdown (a maintained
Markdown library, with its ``tables`` extension) and read back with the standard library's
html.parser; log checksums are recomputed with hashlib (SHA-256, FIPS 180-4); the coverage
plot's explained variance is compared with scikit-learn's PCA (Pedregosa et al., 2011) on the
same rows. The card's sections follow the questions of "Datasheets for Datasets" (Gebru et
al., 2021, Communications of the ACM) where they apply to a set built from logs.
"""

from __future__ import annotations

import hashlib
import json
import re
from html.parser import HTMLParser
from pathlib import Path

import h5py
import numpy as np
import pytest
from click.testing import CliRunner

import goalkit
from goalkit.cli import main
from goalkit.demo.files import make_demo
from goalkit.errors import OutputError
from goalkit.pipeline.build import check_outputs
from goalkit.pipeline.recipe import load_recipe
from goalkit.write.card import MARKER, card_paths, coverage_rows, write_card
from goalkit.write.seal import write_seal

markdown = pytest.importorskip("markdown")


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    d = tmp_path_factory.mktemp("card")
    make_demo(d, episodes=16, seed=3)
    text = (d / "gantry-recipe.toml").read_text().replace("validation = 0.1", "validation = 0.25")
    (d / "gantry-recipe.toml").write_text(text)
    result = goalkit.build(d / "gantry-recipe.toml")
    return d, result


class _Tables(HTMLParser):
    """Tables (rows of cell texts) and image sources of an HTML document."""

    def __init__(self):
        super().__init__()
        self.tables, self.images, self._cell = [], [], None

    def handle_starttag(self, tag, attrs):
        if tag == "table":
            self.tables.append([])
        elif tag == "tr":
            self.tables[-1].append([])
        elif tag in ("td", "th"):
            self._cell = ""
        elif tag == "img":
            self.images.append(dict(attrs)["src"])

    def handle_endtag(self, tag):
        if tag in ("td", "th"):
            self.tables[-1][-1].append(self._cell.strip())
            self._cell = None

    def handle_data(self, data):
        if self._cell is not None:
            self._cell += data


def _parse(card: Path) -> _Tables:
    html = markdown.markdown(card.read_text(encoding="utf-8"), extensions=["tables", "fenced_code"])
    p = _Tables()
    p.feed(html)
    return p


def _table(tables, first_header):
    found = [t for t in tables if t[0][0] == first_header]
    assert found, f"no table headed {first_header!r}"
    return found


def _columns(gs, split):
    return gs.read(split, ["source_episode", "source_step", "strategy", "reached", "goal_distance",
                           "steps_to_goal"], resolve=False)


def test_every_build_writes_a_card_whose_numbers_are_the_sets(built):
    d, result = built
    md, png = card_paths(result.path)
    assert tuple(result.card) == (md, png) and md.is_file() and png.is_file()
    text = md.read_text(encoding="utf-8")
    assert text.startswith(MARKER)
    for section in ("## Motivation", "## Sources", "## How it was made", "## Composition",
                    "## Goal-space coverage", "## Known limits", "## Uses and safety"):
        assert section in text
    assert "qualified safety engineers" in text and "simulation" in text and "regulations" in text
    parsed = _parse(md)
    # every table parses: a header and rows of the same width
    assert len(parsed.tables) >= 6
    for t in parsed.tables:
        assert len(t) >= 2 and all(len(r) == len(t[0]) for r in t), t
    # every linked image exists beside the card
    assert parsed.images == [png.name]
    assert all((md.parent / src).is_file() for src in parsed.images)

    with goalkit.open_set(result.path) as gs:
        codes = json.loads(gs.file["train"]["strategy"].attrs["codes"])
        cols = {s: _columns(gs, s) for s in ("train", "validation")}
        threshold = gs.provenance["reward"]["threshold"]
    # split table: episodes and rows
    (split_t,) = _table(parsed.tables, "split")[:1]
    for split, eps, rows in split_t[1:]:
        c = cols[split]
        assert int(eps) == len(np.unique(c["source_episode"]))
        assert int(rows) == len(c["source_episode"])
    # strategy table: rows, reached and share per split and strategy
    strat_t = [t for t in parsed.tables if t[0][:2] == ["split", "strategy"]][0]
    seen = 0
    for split, name, rows, reached, share in strat_t[1:]:
        c = cols[split]
        code = int(next(k for k, v in codes.items() if v == name))
        mine = c["strategy"] == code
        assert int(rows) == int(mine.sum()) and int(reached) == int(c["reached"][mine].sum())
        assert share == f"{c['reached'][mine].sum() / mine.sum():.2%}"
        seen += int(rows)
    assert seen == sum(len(c["strategy"]) for c in cols.values())
    # goal distance in multiples of the threshold: a < d/threshold <= b
    dist_t = _table(parsed.tables, "d / threshold")[0]
    for label, *counts in dist_t[1:]:
        nums = [float(x) for x in re.findall(r"[0-9.]+", label)]
        for split, n in zip(("train", "validation"), counts):
            dd = cols[split]["goal_distance"].astype(np.float64)
            if label.startswith("<="):
                want = dd <= nums[0] * threshold
            elif label.startswith(">"):
                want = dd > nums[0] * threshold
            else:
                want = (dd > nums[0] * threshold) & (dd <= nums[1] * threshold)
            assert int(n) == int(want.sum()), (label, split)
    # steps to goal in powers of two; "none" is -1
    hor_t = _table(parsed.tables, "steps to goal")[0]
    for label, *counts in hor_t[1:]:
        for split, n in zip(("train", "validation"), counts):
            h = cols[split]["steps_to_goal"]
            if label.startswith("none"):
                want = h < 1
            else:
                lo = int(label.split()[0])
                want = (h >= lo) & (h < 2 * lo)
            assert int(n) == int(want.sum()), (label, split)
    # sources: bytes and SHA-256 recomputed; per-file episodes and transitions from the rows
    file_t = _table(parsed.tables, "log file")
    (path, size, digest) = file_t[0][1]
    logs = Path(path)
    assert int(size) == logs.stat().st_size and digest == hashlib.sha256(logs.read_bytes()).hexdigest()
    counts_row = file_t[1][1]
    assert counts_row[0] == path
    for i, split in enumerate(("train", "validation")):
        c = cols[split]
        assert int(counts_row[1 + i]) == len(np.unique(c["source_episode"]))
        assert int(counts_row[3 + i]) == len(np.unique(c["source_episode"] * 100000 + c["source_step"]))


def test_coverage_plot_is_the_pca_of_the_stated_rows(built):
    from sklearn.decomposition import PCA

    _, result = built
    md, _ = card_paths(result.path)
    text = md.read_text(encoding="utf-8")
    m = re.search(r"of (\d+) train and (\d+) validation goals.*?explain ([0-9.]+)% and ([0-9.]+)%", text, re.S)
    assert m
    with goalkit.open_set(result.path) as gs:
        goals = [gs.file[s]["goal"][coverage_rows(gs.rows(s))] for s in ("train", "validation")]
    assert [len(g) for g in goals] == [int(m[1]), int(m[2])]
    ratio = PCA(n_components=2).fit(np.concatenate(goals).astype(np.float64)).explained_variance_ratio_
    assert [f"{r:.1%}" for r in ratio] == [f"{m[3]}%", f"{m[4]}%"]


def test_info_reads_the_stored_facts_and_matches_the_card(built):
    _, result = built
    facts = goalkit.info(result.path)
    with goalkit.open_set(result.path) as gs:
        assert facts["rows"] == {s: gs.rows(s) for s in ("train", "validation")}
        assert facts["reward"] == gs.provenance["reward"]
        assert facts["widths"] == {"observation": list(gs.file["train"]["observation"].shape[1:]),
                                   "action": list(gs.file["train"]["action"].shape[1:]),
                                   "goal": list(gs.file["train"]["goal"].shape[1:])}
    assert facts["not_stored"] == []
    r = CliRunner().invoke(main, ["info", "--json", str(result.path)])
    assert r.exit_code == 0, r.output
    assert json.loads(r.output) == json.loads(json.dumps(facts))
    r = CliRunner().invoke(main, ["info", str(result.path)])
    assert r.exit_code == 0 and "reward: euclidean distance <= 0.04, sparse reward" in r.output
    assert "widths: observation 9, action 3, goal 6" in r.output and "np." not in r.output
    r = CliRunner().invoke(main, ["info", "--quiet", str(result.path)])
    assert r.exit_code == 0 and r.output == ""


def test_info_on_a_set_built_before_the_card_says_what_it_cannot_show(built, tmp_path):
    _, result = built
    old = tmp_path / "old.h5"
    old.write_bytes(Path(result.path).read_bytes())
    with h5py.File(old, "r+") as f:  # as sets were written before the composition was stored
        summary = json.loads(f.attrs["summary"])
        summary.pop("composition")
        f.attrs["summary"] = json.dumps(summary, sort_keys=True)
        f.attrs["mode"] = "materialised"
        write_seal(f)
    facts = goalkit.info(old)
    assert facts["by_split"] is None and facts["horizon_histogram"] is None
    assert set(facts["not_stored"]) == {"by_split", "goal_distance_histogram", "horizon_histogram",
                                        "sources.counts"}
    assert facts["widths"]["goal"] == [6]  # still read from the columns' shapes
    r = CliRunner().invoke(main, ["info", str(old)])
    assert r.exit_code == 0 and "not stored in this set" in r.output
    written = write_card(old)  # a card can still be written for it, saying what is missing
    text = written[0].read_text(encoding="utf-8")
    assert "not stored in this set" in text
    for t in _parse(written[0]).tables:
        assert all(len(row) == len(t[0]) for row in t)


def test_info_refuses_what_is_not_a_set_in_one_line(tmp_path):
    bad = tmp_path / "x.h5"
    bad.write_bytes(b"not hdf5")
    r = CliRunner().invoke(main, ["info", str(bad)])
    assert r.exit_code == 2 and str(bad) in r.output and "Traceback" not in r.output


def test_card_outputs_are_refused_before_any_work_and_replaced_only_on_request(built, tmp_path):
    d, result = built
    out = tmp_path / "again.h5"
    md, png = card_paths(out)
    md.write_text("my own notes\n")
    runner = CliRunner()
    r = runner.invoke(main, ["build", str(d / "gantry-recipe.toml"), "--out", str(out), "--quiet"])
    assert r.exit_code == 2 and "dataset card already exists" in r.output and not out.exists()
    r = runner.invoke(main, ["build", str(d / "gantry-recipe.toml"), "--out", str(out), "--quiet", "--replace"])
    assert r.exit_code == 2 and "not a dataset card written by goalkit" in r.output
    assert md.read_text() == "my own notes\n" and not out.exists()
    md.unlink()
    r = runner.invoke(main, ["build", str(d / "gantry-recipe.toml"), "--out", str(out), "--quiet", "--no-card"])
    assert r.exit_code == 0 and out.exists() and not md.exists() and not png.exists()
    r = runner.invoke(main, ["build", str(d / "gantry-recipe.toml"), "--out", str(out), "--json", "--replace"])
    assert r.exit_code == 0, r.output
    doc = json.loads(r.output)
    assert doc["card"] == [str(md), str(png)] and doc["file_bytes"] == out.stat().st_size
    assert doc["reward"]["threshold"] == 0.04 and doc["seconds"] > 0
    # the same set gives the same card bytes (no time or machine detail), whatever the chunking
    first = (md.read_bytes(), png.read_bytes())
    r = runner.invoke(main, ["build", str(d / "gantry-recipe.toml"), "--out", str(out), "--quiet", "--replace",
                             "--chunk-rows", "1000"])
    assert r.exit_code == 0, r.output
    assert (md.read_bytes(), png.read_bytes()) == first


def test_the_card_is_never_written_over_an_input(built, tmp_path):
    d, _ = built
    # a recipe file that is where the card of its own output would go
    recipe_file = tmp_path / "set.h5.card.md"
    text = (d / "gantry-recipe.toml").read_text().replace('path = "gantry-logs.h5"', f'path = "{d}/gantry-logs.h5"')
    text = text.replace('layout = "gantry-layout.toml"', f'layout = "{d}/gantry-layout.toml"')
    text = text.replace('path = "gantry-goals.h5"', 'path = "set.h5"')
    recipe_file.write_text(text)
    recipe = load_recipe(recipe_file)
    with pytest.raises(OutputError, match="refusing to write over an input: dataset card"):
        check_outputs(recipe, card=True)
    check_outputs(recipe, card=False)  # without a card there is nothing to clash


def test_build_summary_shows_reward_widths_size_and_time(built, tmp_path):
    d, _ = built
    out = tmp_path / "shown.h5"
    r = CliRunner().invoke(main, ["build", str(d / "gantry-recipe.toml"), "--out", str(out)])
    assert r.exit_code == 0, r.output
    first = r.output.splitlines()[0]
    assert re.fullmatch(rf"wrote {re.escape(str(out))}, [0-9,]+ bytes in [0-9.]+ s", first)
    assert f"{out.stat().st_size:,} bytes" in first
    assert "  reward: euclidean distance <= 0.04, sparse reward" in r.output
    assert "  widths: observation 9, action 3, goal 6" in r.output
    assert "card: " in r.output


def test_a_set_with_an_empty_split_gets_a_card(tmp_path):
    make_demo(tmp_path, episodes=4, seed=1)
    text = (tmp_path / "gantry-recipe.toml").read_text().replace("validation = 0.1", "validation = 0.0")
    (tmp_path / "gantry-recipe.toml").write_text(text)
    result = goalkit.build(tmp_path / "gantry-recipe.toml")
    md = result.card[0]
    assert "0 validation goals" in md.read_text(encoding="utf-8")
    for t in _parse(md).tables:
        assert all(len(row) == len(t[0]) for row in t)


def test_per_file_counts_of_a_folder_of_episode_files(tmp_path):
    # Invented gantry episodes, one NPZ file each, of different lengths.
    rng = np.random.default_rng(0)
    per = tmp_path / "episodes"
    per.mkdir()
    lengths = [5, 7, 9, 11]
    for i, n in enumerate(lengths):
        np.savez(per / f"ep{i}.npz", obs=rng.normal(size=(n + 1, 4)).astype(np.float32),
                 act=rng.normal(size=(n, 2)).astype(np.float32))
    (tmp_path / "layout.toml").write_text('version = 1\nshape = "per-file"\nfile_pattern = "*.npz"\n'
                                          '[keys]\nobservation = "obs"\naction = "act"\n')
    (tmp_path / "recipe.toml").write_text(
        'version = 1\nseed = 0\n[logs]\npath = "episodes"\nlayout = "layout.toml"\n[goal]\nindices = [0, 1]\n'
        '[relabel]\ngoals_per_transition = 2\n[relabel.weights]\nfuture = 1\nfinal = 1\n'
        '[reward]\nthreshold = 0.5\n[split]\nvalidation = 0.5\n[output]\npath = "set.h5"\n')
    result = goalkit.build(tmp_path / "recipe.toml")
    counts = goalkit.info(result.path)["sources"]["counts"]
    assert [Path(c["path"]).name for c in counts] == [f"ep{i}.npz" for i in range(4)]
    with goalkit.open_set(result.path) as gs:
        for i, c in enumerate(counts):
            for split in ("train", "validation"):
                ep = gs.read(split, ["source_episode"], resolve=False)["source_episode"]
                mine = int((ep == i).any())
                assert c["episodes"][split] == mine
                assert c["transitions"][split] == mine * lengths[i]
