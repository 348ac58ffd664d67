"""``goalkit embed``: fit a goal embedding on task logs and save it as an embedding file."""

from __future__ import annotations

import click

from goalkit.cli_support import echo_json, on_interrupt, progress, quiet_option, user_errors
from goalkit.errors import EmbeddingError
from goalkit.goals.embedfile import is_embedding_file
from goalkit.goals.fitlogs import fit_on_logs, precomputed_on_logs
from goalkit.goals.linear import PCA, Raw, Standardised
from goalkit.goals.precomputed import load_values
from goalkit.goals.sfa import SFA
from goalkit.logs import open_logs
from goalkit.outputs import check_no_overlap, refuse_existing

METHOD_NAMES = ("raw", "standardised", "pca", "sfa", "precomputed")


def _make(method: str, dims, degree: int, whiten: bool):
    if dims is not None and method not in ("pca", "sfa"):
        raise EmbeddingError(f"--dims applies to pca and sfa, not {method}", key="--dims")
    if whiten and method != "pca":
        raise EmbeddingError(f"--whiten applies to pca, not {method}", key="--whiten")
    if degree != 1 and method != "sfa":
        raise EmbeddingError(f"--degree applies to sfa, not {method}", key="--degree")
    return {"raw": Raw, "standardised": Standardised}[method]() if method in ("raw", "standardised") else (
        PCA(n_components=dims, whiten=whiten) if method == "pca" else SFA(n_components=dims, degree=degree))


def summarise(gm, source, output) -> dict:
    """The --json summary of a fitted embedding goal map."""
    out = dict(gm.embedding.summary())
    if gm.embedding.kind == "frames":
        out["method"] = gm.embedding.embedding.kind
    out.update({"output": str(output), "logs": source.path, "input": gm.input,
                "episodes": int(len(source.lengths)), "states": int(source.lengths.sum() + len(source.lengths)),
                "fields": list(gm.fields), "indices": None if gm.indices is None else list(gm.indices),
                "fingerprint": gm.describe()["fingerprint"], "notes": list(getattr(source, "notes", []))})
    return out


def format_summary(s: dict) -> str:
    """The human-readable summary."""
    lines = [f"wrote {s['output']}",
             f"  {s['method']} on {s['input']} ({s['input_dim']} -> {s['dims']} dims), "
             f"{s['episodes']:,} episodes, {s['states']:,} states"]
    if "explained_variance_ratio" in s:
        lines.append(f"  explained variance: {s['explained_variance_ratio_total']:.1%} "
                     f"({', '.join(f'{v:.3f}' for v in s['explained_variance_ratio'][:8])}"
                     f"{', ...' if len(s['explained_variance_ratio']) > 8 else ''})")
    if "delta" in s:
        lines.append(f"  slowness (delta, slowest first): {', '.join(f'{v:.3g}' for v in s['delta'][:8])}"
                     f"{', ...' if len(s['delta']) > 8 else ''}")
    lines.extend(f"  note: {n}" for n in s.get("notes", []))
    return "\n".join(lines)


@click.command("embed", context_settings={"show_default": True})
@click.argument("logs", type=click.Path(), metavar="LOGS")
@click.option("--layout", "layout", type=click.Path(dir_okay=False, exists=True), default=None,
              help="Layout file (TOML) of the logs; proposed from the logs when omitted.")
@click.option("--method", type=click.Choice(METHOD_NAMES), required=True,
              help="raw: identity; standardised: per-dimension scaling; pca; sfa: slow feature analysis; "
                   "precomputed: an array given with --values.")
@click.option("--dims", type=click.IntRange(min=1), default=None,
              help="Output dimensions (pca, sfa); default: all.")
@click.option("--input", "input_", type=click.Choice(["observation", "frame"]), default="observation",
              help="Fit on observation columns or on camera frames.")
@click.option("--fields", default=None, metavar="A,B",
              help="Observation fields to use, comma-separated (layout [fields]); default: all columns.")
@click.option("--degree", type=click.IntRange(1, 2), default=1,
              help="sfa: 1 linear, 2 on the degree-2 polynomial expansion.")
@click.option("--whiten", is_flag=True, help="pca: scale the components to unit variance.")
@click.option("--block", type=click.IntRange(min=1), default=2,
              help="frames: average BLOCK x BLOCK pixel tiles before the embedding.")
@click.option("--values", type=click.Path(dir_okay=False, exists=True), default=None,
              help="precomputed: .npy array with one row per logged state (episode length + 1 each).")
@click.option("--chunk-steps", type=click.IntRange(min=1), default=200_000,
              help="Transitions read per chunk (memory only; the result does not depend on it).")
@click.option("-o", "--output", type=click.Path(dir_okay=False), required=True,
              help="Embedding file to write (.npz); never one of the inputs.")
@click.option("--replace", is_flag=True,
              help="Replace an existing embedding file at OUTPUT (only a goalkit embedding file is ever "
                   "replaced; without this option an existing file is refused).")
@click.option("--json", "as_json", is_flag=True, help="Print the summary as one JSON object.")
@quiet_option
@user_errors
def embed(logs, layout, method, dims, input_, fields, degree, whiten, block, values, chunk_steps, output,
          replace, as_json, quiet):
    """Fit a goal embedding on the states of LOGS and save it to OUTPUT.

    The embedding file can then be named in a recipe ([goal] embedding = "FILE").
    """
    import numpy as np

    # before any work: never over an input, never over a file that is not a goalkit embedding
    check_no_overlap([("logs", logs), ("layout", layout), ("values", values)], [("--output", output)])
    refuse_existing(output, replace=replace, ours=is_embedding_file, what="embedding file")

    on_interrupt(f"nothing was written at {output}")
    names = [f.strip() for f in fields.split(",") if f.strip()] if fields else []
    if method == "precomputed":
        if values is None:
            raise EmbeddingError("--method precomputed needs --values FILE.npy", key="--values")
        if names or input_ != "observation":
            raise EmbeddingError("--fields and --input do not apply to precomputed values", key="--fields")
        if dims is not None or whiten or degree != 1:
            raise EmbeddingError("--dims, --whiten and --degree do not apply to precomputed values", key="--dims")
    elif values is not None:
        raise EmbeddingError(f"--values applies to precomputed, not {method}", key="--values")
    if input_ == "frame" and names:
        raise EmbeddingError("--fields selects observation columns; it does not apply to --input frame",
                             key="--fields")
    source = open_logs(logs, layout)
    unknown = [n for n in names if n not in source.fields]
    if unknown:
        raise EmbeddingError(f"goal field '{unknown[0]}' is not an observation field of the logs; fields are: "
                             f"{', '.join(source.fields) or '(none: the layout names no fields)'}", key="--fields")
    if method == "precomputed":
        gm = precomputed_on_logs(source, load_values(values), file=values)
    else:
        embedding = _make(method, dims, degree, whiten)
        total = int(np.sum(source.lengths))
        with progress(total, "embed", quiet=quiet or as_json) as bar:
            gm = fit_on_logs(source, embedding, input=input_, fields=names, block=block, chunk_steps=chunk_steps,
                             advance=bar.update)
    gm.save(output, replace=replace)
    summary = summarise(gm, source, output)
    if as_json:
        echo_json(summary)
    elif not quiet:
        click.echo(format_summary(summary))
