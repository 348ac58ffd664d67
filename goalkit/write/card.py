"""The dataset card: a Markdown file and a goal-coverage PNG beside every built set.

The card answers, where they apply to a goal-conditioned set built from logs, the questions of a
datasheet for a dataset (motivation, sources, how it was made, composition, known limits, uses):
see docs/card.md. Its facts are the set's stored attributes (:func:`goalkit.write.info.set_facts`,
the same ones ``goalkit info`` prints); the coverage plot is a 2-D PCA projection (numpy SVD) of
evenly spaced rows of the train and validation goals, read from the set.

Files (NAME is the set's file name): ``NAME.card.md`` and ``NAME.card-goals.png``. Both are
written through :mod:`goalkit.outputs` (exclusive temporary name, then published), refused when
they exist unless ``replace`` (and then only a card / PNG is replaced), and contain no time or
machine detail, so the same set gives the same card bytes with one matplotlib.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from goalkit.outputs import is_png, output_file, refuse_existing, starts_with
from goalkit.rows import SPLITS
from goalkit.write.graphplot import has_graph_steps, plot_graph_distance
from goalkit.write.info import dtypes_text, reward_text, set_facts, widths_text
from goalkit.write.reader import GoalSet

#: The card's first line: what makes an existing Markdown file "ours" (replaceable with --replace).
MARKER = "<!-- goalkit dataset card -->"
#: Goals per split drawn for the coverage plot (evenly spaced rows).
COVERAGE_ROWS = 2000


def card_paths(set_path) -> tuple[Path, Path]:
    """The card's Markdown file and its coverage PNG for a set at ``set_path``."""
    p = Path(set_path)
    return p.with_name(f"{p.name}.card.md"), p.with_name(f"{p.name}.card-goals.png")


def graph_plot_path(set_path) -> Path:
    """The card's PNG of graph steps against goal distance (sets built with a ``[graph]`` table)."""
    p = Path(set_path)
    return p.with_name(f"{p.name}.card-graph.png")


def is_card(path) -> bool:
    """True when ``path`` is a regular file starting with the card's marker line."""
    return starts_with(path, MARKER.encode("utf-8"))



def check_card_outputs(set_path, replace: bool = False) -> None:
    """Refuse, before any work, existing card files (unless ``replace`` and they are a card / PNG)."""
    md, png = card_paths(set_path)
    refuse_existing(md, replace=replace, ours=is_card, what="dataset card")
    refuse_existing(png, replace=replace, ours=is_png, what="card plot")
    refuse_existing(graph_plot_path(set_path), replace=replace, ours=is_png, what="card plot")


# ---- coverage --------------------------------------------------------------------------------
def coverage_rows(n: int, k: int = COVERAGE_ROWS) -> np.ndarray:
    """Up to ``k`` evenly spaced row numbers of ``n`` rows (increasing, distinct)."""
    if n <= k:
        return np.arange(n, dtype=np.int64)
    return np.unique(np.linspace(0, n - 1, k).round().astype(np.int64))


def coverage_goals(path) -> dict:
    """The goals of :func:`coverage_rows` of each split, as float64 ``{split: (m, G) array}``."""
    with GoalSet(path) as gs:
        out = {}
        for s in SPLITS:
            rows = coverage_rows(gs.rows(s))
            column = gs.file[s]["goal"]
            width = int(np.prod(column.shape[1:]))
            goals = column[rows] if len(rows) else np.zeros((0, width))
            out[s] = np.asarray(goals, dtype=np.float64).reshape(len(rows), width)
    return out


def project(goals: dict) -> tuple[dict, np.ndarray]:
    """2-D PCA of the goals of both splits (centred on their joint mean, numpy SVD).

    Returns
    -------
    (dict, ndarray)
        ``{split: (m, 2) coordinates}`` and the explained variance ratio of the two axes. Each
        axis's sign is fixed so that its largest loading is positive (SVD leaves it open). A
        goal space of one dimension gets a second axis of zeros.
    """
    both = np.concatenate([goals[s] for s in SPLITS])
    if both.size == 0:
        return {s: np.zeros((len(goals[s]), 2)) for s in SPLITS}, np.zeros(2)
    mean = both.mean(axis=0)
    _, sv, vt = np.linalg.svd(both - mean, full_matrices=False)
    vt = vt[:2]
    signs = np.sign(vt[np.arange(len(vt)), np.abs(vt).argmax(axis=1)])
    vt = vt * np.where(signs == 0, 1.0, signs)[:, None]
    var = sv ** 2
    ratio = var[:2] / var.sum() if var.sum() > 0 else np.zeros(min(2, len(var)))
    coords = {s: (goals[s] - mean) @ vt.T for s in SPLITS}
    if vt.shape[0] < 2:
        coords = {s: np.column_stack([c, np.zeros(len(c))]) for s, c in coords.items()}
        ratio = np.r_[ratio, 0.0]
    return coords, np.asarray(ratio[:2], dtype=np.float64)


def coverage_figure(coords: dict, ratio):
    """The matplotlib figure of the coverage plot (Agg canvas; no pyplot)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(5.5, 4.5), dpi=100)
    FigureCanvasAgg(fig)
    ax = fig.add_subplot(1, 1, 1)
    for s, colour, marker in (("train", "tab:blue", "."), ("validation", "tab:orange", "x")):
        c = coords[s]
        ax.scatter(c[:, 0], c[:, 1], s=6 if s == "train" else 10, c=colour, marker=marker,
                   alpha=0.5 if s == "train" else 0.8, label=f"{s} goals ({len(c):,} rows)", linewidths=0.6)
    ax.set_xlabel(f"PCA axis 1 ({ratio[0]:.1%} of variance)")
    ax.set_ylabel(f"PCA axis 2 ({ratio[1]:.1%} of variance)")
    ax.set_title("Goal-space coverage: train and validation goals", fontsize=10)
    ax.legend(loc="best", fontsize=8)
    fig.tight_layout()
    return fig


# ---- Markdown --------------------------------------------------------------------------------
def _cell(value) -> str:
    return str(value).replace("|", "\\|").replace("\n", " ")


def _table(header, rows) -> list[str]:
    out = ["| " + " | ".join(_cell(h) for h in header) + " |", "|" + " --- |" * len(header)]
    out += ["| " + " | ".join(_cell(c) for c in r) + " |" for r in rows]
    return out + [""]


def _share(n: int, of: int) -> str:
    return f"{n / of:.2%}" if of else "-"


def render(facts: dict, png_name: str, coverage: dict | None = None, graph_png: str | None = None) -> str:
    """The card's Markdown text for :func:`~goalkit.write.info.set_facts` facts.

    Parameters
    ----------
    facts : dict
    png_name : str
        File name of the coverage PNG (linked relative to the card).
    coverage : dict, optional
        ``{"rows": {split: m}, "ratio": [r1, r2]}`` of the coverage plot.
    """
    name = Path(facts["path"]).name
    L = [MARKER, f"# Dataset card: {name}", "",
         f"Written by goalkit {facts['goalkit_version']} with the set (format version {facts['format_version']}). "
         f"Every fact below is stored in the set; `goalkit info {name}` prints them. docs/card.md explains "
         f"each section.", ""]
    # motivation
    L += ["## Motivation", "", facts["purpose"], ""]
    # sources
    src = facts["sources"]
    L += ["## Sources", "", f"Logs: `{src['logs_path']}`" + (f"; layout: `{src['layout_path']}`" if src["layout_path"]
                                                           else "; layout: detected from the logs") + ".", ""]
    files = src.get("log_files") or []
    L += _table(["log file", "bytes", "SHA-256"], [[f"`{f['path']}`", f"{f['bytes']}", f"`{f['sha256']}`"] for f in files])
    for f in src.get("embedding_files") or []:
        L += [f"Goal embedding: `{f['path']}` ({f['bytes']} bytes, SHA-256 `{f['sha256']}`).", ""]
    counts = src.get("counts")
    if counts:
        L += ["Kept episodes and transitions per log file:", ""]
        L += _table(["log file", "train episodes", "validation episodes", "train transitions",
                     "validation transitions"],
                    [[f"`{c['path']}`" if c["path"] else "(the reader does not say which file)",
                      c["episodes"]["train"], c["episodes"]["validation"], c["transitions"]["train"],
                      c["transitions"]["validation"]] for c in counts])
    else:
        L += ["Per-file counts: not stored in this set (built before goalkit stored them).", ""]
    by_source = facts.get("by_source")
    if by_source:
        L += ["Goal rows per source (each transition of a source gets its goals_per_transition rows):", ""]
        L += _table(["source", "episodes", "transitions", "goals per transition", "train rows", "validation rows"],
                    [[f"`{name}`", v["episodes"], v["transitions"], v.get("goals_per_transition", "-"),
                      v["rows"]["train"], v["rows"]["validation"]] for name, v in by_source.items()])
    # how it was made
    L += ["## How it was made", ""]
    if facts["rebuild_command"]:
        L += ["Command that rebuilds this set from the same logs (same bytes):", "", "```sh",
              facts["rebuild_command"], "```", ""]
    L += [f"- seed: {facts['seed']}", f"- mode: {facts['mode']}",
          f"- reward rule: {reward_text(facts['reward'])}",
          f"- goal map: `{_json(facts['goal_map'])}`", f"- relabelling: `{_json(facts['relabel'])}`",
          f"- split: `{_json(facts['split'])}` (whole episodes; a goal never crosses the split)", "",
          "Recipe, as stored in the set:", "", "```toml", facts["recipe"].rstrip("\n"), "```", ""]
    # composition
    rows, eps = facts["rows"], facts["episodes"]
    L += ["## Composition", "", f"Widths: {widths_text(facts['widths'])}.", "",
          f"Stored dtypes: {dtypes_text(facts.get('dtypes'))}.", ""]
    L += _table(["split", "episodes", "rows"], [[s, eps[s], rows[s]] for s in SPLITS])
    by = facts["by_split"]
    if by:
        L += ["Rows and reached rows (goal within the threshold) per split and strategy:", ""]
        table = []
        for s in SPLITS:
            for strat, c in by[s].items():
                table.append([s, strat, c["rows"], c["reached"], _share(c["reached"], c["rows"])])
        L += _table(["split", "strategy", "rows", "reached", "reached share"], table)
    d = facts["goal_distance_histogram"]
    if d:
        edges = [f"{r:g}" for r in d["ratios"]]
        labels = [f"<= {edges[0]}"] + [f"{a} - {b}" for a, b in zip(edges, edges[1:])] + [f"> {edges[-1]}"]
        L += [f"Goal distance in multiples of the reach threshold ({d['unit']:g}); an interval a - b "
              f"counts a < d/threshold <= b:", ""]
        L += _table(["d / threshold", *SPLITS], [[lab, d["counts"]["train"][i], d["counts"]["validation"][i]]
                                                 for i, lab in enumerate(labels)])
        if any(d["nan"].values()):
            L += [f"Rows with an undefined distance (NaN): train {d['nan']['train']}, validation "
                  f"{d['nan']['validation']}.", ""]
    h = facts["horizon_histogram"]
    if h:
        L += ["Steps to goal (j - t, for goals later in the same episode), in powers of two:", ""]
        hrows = [[f"{lo}" if lo == 1 else f"{lo} - {2 * lo - 1}", h["counts"]["train"][i], h["counts"]["validation"][i]]
                 for i, lo in enumerate(h["low"])]
        hrows.append(["none (goal from elsewhere or the transition itself)", h["none"]["train"], h["none"]["validation"]])
        L += _table(["steps to goal", *SPLITS], hrows)
    if facts.get("heads"):
        L += ["Goal heads (`[output] goals = \"heads\"`: one row per transition, one goal per head in the "
              "columns FIELD@HEAD; docs/dataset.md):", ""]
        L += _table(["head", "source", "rows", "reached", "reached share", "gamma", "past end", "subgoal steps"],
                    [[h_["name"], src, c["rows"], c["reached"], _share(c["reached"], c["rows"]), f"{h_['gamma']:g}",
                      h_["past_end"], h_["steps"] if src == "subgoal" else "-"]
                     for h_ in facts["heads"] for src, c in h_["sources"].items()])
    if not (by and d and h):
        L += ["Per-split composition: not stored in this set (built before goalkit stored it).", ""]
    # coverage
    L += ["## Goal-space coverage", ""]
    if coverage is not None:
        r = coverage["rows"]
        L += [f"![Goal-space coverage: PCA of train and validation goals]({png_name})", "",
              f"A 2-D PCA projection (numpy SVD, centred on the joint mean) of {r['train']} train and "
              f"{r['validation']} validation goals, evenly spaced rows of each split. The two axes explain "
              f"{coverage['ratio'][0]:.1%} and {coverage['ratio'][1]:.1%} of the variance of those goals. "
              "Validation goals far from every train goal are goals a policy has not been trained near.", ""]
    else:
        L += ["No coverage plot was drawn.", ""]
    if graph_png is not None:
        L += ["## Graph distances", "",
              f"![Graph steps against goal distance per strategy]({graph_png})", "",
              "Steps from s_t+1 to the goal state in the logs' own graph (logged transitions and joins "
              "between episodes; docs/graph.md) against the goal distance of the reward rule, for a "
              "sample of rows per strategy. Rows beyond the graph's horizon are counted in each title.", ""]
    # limits
    lim = facts["limits"]
    L += ["## Known limits", ""]
    skipped = lim["skipped_episodes"]
    L.append(f"- skipped episodes: {len(skipped)}" + (
        " (" + "; ".join(f"episode {e}: {why}" for e, why in skipped[:10]) + (", ..." if len(skipped) > 10 else "")
        + ")" if skipped else ""))
    for w in lim["warnings"]:
        L.append(f"- build warning: {w}")
    for n in lim["log_notes"]:
        L.append(f"- log note: {n}")
    L += ["- rewards and reached flags follow the reward rule above: they are as good as its threshold "
          "(see `goalkit tune`), not a judgement of task success",
          "- the rows reflect the logged behaviour, including its mistakes; relabelled goals are states "
          "the logs reached, not goals anyone asked for"]
    if facts["not_stored"]:
        L.append(f"- not stored in this set: {', '.join(facts['not_stored'])}")
    L += ["", "## Uses and safety", "", facts["safety"], ""]
    return "\n".join(L)


def _json(value) -> str:
    return json.dumps(value, sort_keys=True)


def write_card(set_path, *, replace: bool = False, plot: bool = True) -> list[Path]:
    """Write the card (and its coverage PNG) of the set at ``set_path``.

    Parameters
    ----------
    set_path : str or Path
        A built set.
    replace : bool
        Replace an existing card / PNG of the same names (only files of those kinds).
    plot : bool
        Draw the coverage plot.

    Returns
    -------
    list of Path
        The files written: the Markdown card, then the PNG.
    """
    md, png = card_paths(set_path)
    check_card_outputs(set_path, replace=replace)
    facts = set_facts(set_path)
    written = []
    coverage = None
    if plot:
        goals = coverage_goals(set_path)
        coords, ratio = project(goals)
        fig = coverage_figure(coords, ratio)
        with output_file(png, replace=replace, ours=is_png, what="card plot") as f:
            fig.savefig(f, format="png", metadata={"Software": None})
        written.append(png)
        coverage = {"rows": {s: len(goals[s]) for s in SPLITS}, "ratio": ratio.tolist()}
    graph_png = None
    if plot and has_graph_steps(set_path):
        graph_png = plot_graph_distance(set_path, graph_plot_path(set_path), replace=replace)
        written.append(graph_png)
    with output_file(md, replace=replace, ours=is_card, what="dataset card") as f:
        f.write(render(facts, png.name, coverage, None if graph_png is None else graph_png.name).encode("utf-8"))
    return [md, *written]


__all__ = ["COVERAGE_ROWS", "MARKER", "card_paths", "check_card_outputs", "coverage_goals", "coverage_rows",
           "coverage_figure", "graph_plot_path", "is_card", "is_png", "project", "render", "write_card"]
