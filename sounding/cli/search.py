"""``sounding search``: the best passages for a query, from the index folder or a server."""

from __future__ import annotations

import json
import os
import sys
from collections.abc import Iterable, Mapping
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import click

from sounding.indexer.query import MODES

from ._common import example, index_and_model, settings

# What one passage shows, in both modes: the fields of the API's Passage.
PASSAGE_FIELDS = (
    "rank", "score", "chunk_id", "document_id", "collection", "title", "source", "trail",
    "text", "page",
)  # fmt: skip


def parse_after(value: str | None) -> datetime | None:
    """``--after``: an ISO 8601 date or time (no zone: UTC) or Unix seconds, as the API takes."""
    if value is None:
        return None
    text = value.strip()
    try:
        moment = (
            datetime.fromtimestamp(float(text), timezone.utc)
            if text.replace(".", "", 1).isdigit()
            else datetime.fromisoformat(text.replace("Z", "+00:00").replace("z", "+00:00"))
        )
    except (ValueError, OverflowError, OSError):
        raise click.BadParameter(
            f"{value!r} is not a date; give ISO 8601 (2026-06-01 or 2026-06-01T08:00:00Z) "
            "or Unix seconds",
            param_hint="'--after'",
        ) from None
    return moment if moment.tzinfo else moment.replace(tzinfo=timezone.utc)


def print_passages(passages: Iterable[Mapping[str, Any]], as_json: bool) -> None:
    """The one way results are printed, whether they came from the index or a server."""
    rows = [{name: p.get(name) for name in PASSAGE_FIELDS} for p in passages]
    for row in rows:
        row["trail"] = list(row["trail"] or ())
    if as_json:
        click.echo(json.dumps(rows, indent=2, ensure_ascii=False))
        return
    if not rows:
        click.echo("no results")
    for h in rows:
        page = f" (page {h['page']})" if h["page"] else ""
        click.echo(f"{h['rank']:>2}. {h['score']:.3f}  {h['title']}  [{h['document_id']}]{page}")
        if h["trail"]:
            click.echo(f"    {' > '.join(h['trail'])}")
        snippet = " ".join(h["text"].split())
        click.echo(f"    {snippet[:240]}{'…' if len(snippet) > 240 else ''}")


def _hint_marker() -> Path:
    cache = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return Path(cache) / "sounding" / "server-hint-shown"


def hint_server_once() -> None:
    """On a terminal, say once per user how to get answers without loading the model."""
    if not sys.stderr.isatty():
        return
    marker = _hint_marker()
    if marker.exists():
        return
    click.echo(
        "sounding: note: without --server each search loads the model (seconds); for fast "
        "answers start `sounding serve` and search with --server http://127.0.0.1:8757 "
        "(or export SOUNDING_SERVER); this note is shown once",
        err=True,
    )
    try:
        marker.parent.mkdir(parents=True, exist_ok=True)
        marker.touch()
    except OSError:
        pass  # a read-only home: the note shows again, no harm done


def _from_server(
    server: str, key_file: str | None, query: str, k: int, mode: str, filters: dict[str, Any]
) -> list[dict[str, Any]]:
    from ._client import api_key, post_search

    body = {"query": query, "k": k, "mode": mode}
    body.update({name: value for name, value in filters.items() if value})
    if filters.get("modified_after") is not None:
        body["modified_after"] = filters["modified_after"].isoformat()
    return post_search(server, body, api_key(key_file))


def _in_process(
    index_dir: str | None, model_path: str | None, query: str, k: int, mode: str, filters: dict
) -> list[dict[str, Any]]:
    from sounding.indexer.search import SearchFilter
    from sounding.indexer.settings import searcher_factory
    from sounding.indexer.store import IndexReader

    config = settings(index_dir=index_dir, model_path=model_path)
    reader = IndexReader(config.index_dir)  # a missing index fails before the model loads
    hint_server_once()
    searcher = searcher_factory(config, config.embedder())(reader)
    after = filters["modified_after"]
    # The shell reads the index folder itself, so it sees every document (no groups).
    where = SearchFilter(
        collections=tuple(filters["collections"] or ()),
        tags=tuple(filters["tags"] or ()),
        source_prefix=filters["source_prefix"],
        modified_after=None if after is None else after.timestamp(),
    )
    return [h.__dict__ for h in searcher.search(query, k, mode=mode, where=where)]


@click.command(
    "search",
    short_help="search the index, or a running service with --server",
    help="Print the passages that best match QUERY. Without --server it reads the index "
    "folder and loads the model for this one query; with --server (or SOUNDING_SERVER) it "
    "asks a running `sounding serve`, sending the key from --key-file, SOUNDING_API_KEY_FILE "
    "or SOUNDING_API_KEY, and sees what that key may read.",
    epilog=example(
        "examples:\n  sounding search 'how do I restore the database?' -k 3\n"
        "  sounding search 'valve torque' --under runbooks/ --tag pumps --after 2026-01-01\n"
        "  sounding search 'who is on call?' --server http://127.0.0.1:8757 "
        "--key-file ~/.sounding-key\n"
        "exit codes: 0 done, 2 bad argument or setting, 4 index, 69 server unreachable or "
        "failing, 77 key refused"
    ),
)
@click.argument("query", metavar="QUERY")
@index_and_model
@click.option(
    "--server",
    metavar="URL",
    envvar="SOUNDING_SERVER",
    help="ask the service at URL instead of reading the index (default: $SOUNDING_SERVER)",
)
@click.option(
    "--key-file",
    metavar="FILE",
    envvar="SOUNDING_API_KEY_FILE",
    help="file holding the API key for --server (default: $SOUNDING_API_KEY_FILE, "
    "else the key in $SOUNDING_API_KEY)",
)
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
@click.option(
    "--after",
    metavar="DATE",
    help="only documents modified after DATE (ISO 8601, no zone = UTC; or Unix seconds)",
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
    server: str | None,
    key_file: str | None,
    collections: tuple[str, ...],
    tags: tuple[str, ...],
    under: str | None,
    after: str | None,
    k: int,
    mode: str,
    as_json: bool,
) -> int:
    filters = {
        "collections": list(collections),
        "tags": list(tags),
        "source_prefix": under,
        "modified_after": parse_after(after),
    }
    if server:
        passages = _from_server(server, key_file, query, k, mode, filters)
    else:
        passages = _in_process(index_dir, model_path, query, k, mode, filters)
    print_passages(passages, as_json)
    return 0


COMMANDS = (search_command,)
