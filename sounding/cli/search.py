"""``sounding search``: the best passages for a query, from the shell."""

from __future__ import annotations

import json

import click

from sounding.indexer.query import MODES

from ._common import example, index_and_model, settings


@click.command(
    "search",
    short_help="search the index from the shell",
    help="Print the passages that best match QUERY.",
    epilog=example(
        "examples:\n  sounding search 'how do I restore the database?' -k 3\n"
        "  sounding search 'valve torque' --under runbooks/ --tag pumps"
    ),
)
@click.argument("query", metavar="QUERY")
@index_and_model
@click.option(
    "--collection",
    "collections",
    multiple=True,
    metavar="NAME",
    help="only this collection (repeat for several)",
)
@click.option(
    "--tag",
    "tags",
    multiple=True,
    metavar="TAG",
    help="only documents with this tag (repeat: any of them)",
)
@click.option(
    "--under", metavar="PREFIX", help="only documents whose id or source path starts with PREFIX"
)
@click.option("-k", "k", type=int, default=5, metavar="N", help="passages to show (default 5)")
@click.option(
    "--mode",
    type=click.Choice(MODES),
    default="hybrid",
    help="dense (meaning), lexical (BM25 words) or hybrid (both; default)",
)
@click.option("--json", "as_json", is_flag=True, help="print results as JSON")
def search_command(
    query: str,
    index_dir: str | None,
    model_path: str | None,
    collections: tuple[str, ...],
    tags: tuple[str, ...],
    under: str | None,
    k: int,
    mode: str,
    as_json: bool,
) -> int:
    from sounding.indexer.search import SearchFilter
    from sounding.indexer.settings import searcher_factory
    from sounding.indexer.store import IndexReader

    config = settings(index_dir=index_dir, model_path=model_path)
    reader = IndexReader(config.index_dir)  # a missing index fails before the model loads
    searcher = searcher_factory(config, config.embedder())(reader)
    # The shell reads the index folder itself, so it sees every document (no groups).
    where = SearchFilter(collections=collections, tags=tags, source_prefix=under)
    hits = searcher.search(query, k, mode=mode, where=where)
    if as_json:
        click.echo(
            json.dumps(
                [h.__dict__ | {"trail": list(h.trail)} for h in hits], indent=2, ensure_ascii=False
            )
        )
        return 0
    if not hits:
        click.echo("no results")
    for h in hits:
        trail = " > ".join(h.trail)
        page = f" (page {h.page})" if h.page else ""
        click.echo(f"{h.rank:>2}. {h.score:.3f}  {h.title}  [{h.document_id}]{page}")
        if trail:
            click.echo(f"    {trail}")
        snippet = " ".join(h.text.split())
        click.echo(f"    {snippet[:240]}{'…' if len(snippet) > 240 else ''}")
    return 0


COMMANDS = (search_command,)
