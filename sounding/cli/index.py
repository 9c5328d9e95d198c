"""``sounding index`` and ``sounding check``: build the index, verify it, repair it."""

from __future__ import annotations

import json
from pathlib import Path

import click

from sounding.indexer.errors import SettingsError

from ._common import example, index_and_model, progress_bar, settings


@click.command(
    "index",
    short_help="build or refresh the index from folders or files",
    help="Build or refresh the index. Unchanged documents are not re-embedded; "
    "documents gone from a folder are removed from the index.",
    epilog=example(
        "example:\n  sounding index ~/wiki-export --index /srv/sounding/index\n"
        "exit codes: 0 done, 1 nothing indexable, 2 bad argument, 3 model, 4 index, "
        "75 another run holds the index"
    ),
)
@click.argument("paths", nargs=-1, required=True, metavar="PATH...")
@index_and_model
@click.option(
    "--rebuild",
    is_flag=True,
    help="discard the index and build it anew (after changing model or chunking)",
)
@click.option(
    "--collection",
    metavar="NAME",
    help="collection name for these paths (default: each folder's name)",
)
@click.option("--json", "as_json", is_flag=True, help="print the report as JSON")
@click.option("--quiet", is_flag=True, help="no progress bar")
@click.option(
    "--max-runtime",
    type=float,
    metavar="SECONDS",
    help="stop cleanly at the first checkpoint after this long; the next run carries on",
)
def index_command(
    paths: tuple[str, ...],
    index_dir: str | None,
    model_path: str | None,
    rebuild: bool,
    collection: str | None,
    as_json: bool,
    quiet: bool,
    max_runtime: float | None,
) -> int:
    from sounding.indexer.build import refresh_index

    config = settings(index_dir=index_dir, model_path=model_path)
    roots = [Path(p) for p in paths]
    for path in roots:  # before the slow model load, so a typo fails at once
        if not path.exists():
            raise SettingsError(
                f"the folder to index does not exist: {path}; name a folder (or file) of documents"
            )
    report = refresh_index(
        roots,
        config,
        config.embedder(),
        rebuild=rebuild,
        collection=collection,
        progress=None if quiet else progress_bar(),
        max_runtime=max_runtime,
    )
    if as_json:
        click.echo(json.dumps(report.to_json(), indent=2))
    else:
        # Counts, then every skipped file with its reason and every warning about a document.
        click.echo(report.text())
    if report.lock_taken_over:
        click.echo(
            "sounding: note: the previous run died holding the lock; this run took it over",
            err=True,
        )
    if report.documents == 0:
        why = (
            "see the skipped files above"
            if report.skipped
            else f"no file in {', '.join(paths)} is one sounding reads "
            "(.md, .markdown, .html, .htm, .pdf, .txt, corpus.jsonl); name a folder that holds some"
        )
        click.echo(f"sounding: error: nothing could be indexed; {why}", err=True)
        return 1
    return 0


@click.command(
    "check",
    short_help="verify that the index files agree; --repair rebuilds derived data",
    help="Check that every chunk has a vector and vice versa, that the lexical "
    "index matches the chunks and the manifest the files. Exit 0 when consistent, 1 when "
    "a problem is found (each printed on its own line).",
    epilog=example(
        "example:\n  sounding check --index /srv/sounding/index || "
        "sounding check --repair --index /srv/sounding/index"
    ),
)
@index_and_model
@click.option(
    "--repair",
    is_flag=True,
    help="rebuild the vector file and the lexical index from the chunk rows",
)
def check_command(index_dir: str | None, model_path: str | None, repair: bool) -> int:
    from sounding.indexer.check import check_index, repair_index

    config = settings(index_dir=index_dir, model_path=model_path)
    report = (repair_index if repair else check_index)(config.index_dir)
    for line in report.repaired:
        click.echo(f"repaired: {line}")
    for problem in report.problems:
        click.echo(f"problem: {problem}")
    for note in report.notes:
        click.echo(f"note: {note}")
    if report.ok:
        click.echo(f"index at {config.index_dir} is consistent")
        return 0
    if not repair:
        click.echo("run `sounding check --repair` to rebuild what can be derived", err=True)
    return 1


COMMANDS = (index_command, check_command)
