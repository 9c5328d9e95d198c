"""The ``sounding`` command: thin wrappers over library calls.

Each command parses its options, calls one function, and turns sounding's
own errors into one line on stderr and a non-zero exit code.
"""

from __future__ import annotations

import argparse
import ipaddress
import json
import os
import sys
from collections.abc import Callable, Sequence
from pathlib import Path

from indexer.errors import SettingsError, SoundingError

EXIT_UNEXPECTED = 70
EXIT_INTERRUPTED = 130


def _settings(args: argparse.Namespace):
    from .settings import ServiceSettings

    overrides = {}
    for name in ("index_dir", "model_path", "host", "port"):
        value = getattr(args, name, None)
        if value is not None:
            overrides[name] = value
    try:
        return ServiceSettings(**overrides)
    except ValueError as exc:  # pydantic's ValidationError is a ValueError
        raise SettingsError(f"invalid setting: {exc}".replace("\n", " ")) from exc


def _progress_bar() -> Callable[[int, int], None] | None:
    """A tqdm bar on stderr when it is a terminal (cron logs stay clean)."""
    if not sys.stderr.isatty():
        return None
    from tqdm import tqdm

    bar: dict[str, tqdm] = {}

    def update(done: int, total: int) -> None:
        if "bar" not in bar:
            bar["bar"] = tqdm(total=total, unit="chunk", desc="embedding", file=sys.stderr)
        b = bar["bar"]
        b.update(done - b.n)
        if done >= total:
            b.close()

    return update


def cmd_index(args: argparse.Namespace) -> int:
    from indexer.build import refresh_index

    settings = _settings(args)
    paths = [Path(p) for p in args.paths]
    for path in paths:  # before the slow model load, so a typo fails at once
        if not path.exists():
            raise SettingsError(f"path to index does not exist: {path}")
    report = refresh_index(
        paths,
        settings,
        settings.embedder(),
        rebuild=args.rebuild,
        collection=args.collection,
        progress=None if args.quiet else _progress_bar(),
    )
    if args.json:
        print(json.dumps(report.to_json(), indent=2))
    else:
        print(report.summary())
        for s in report.skipped:
            print(f"skipped {s.path}: {s.reason}")
    if report.documents == 0:
        print("sounding: error: nothing could be indexed; see the skipped files above",
              file=sys.stderr)
        return 1
    return 0


def cmd_search(args: argparse.Namespace) -> int:
    from indexer.search import Searcher
    from indexer.store import IndexReader

    settings = _settings(args)
    reader = IndexReader(settings.index_dir)
    searcher = Searcher(
        reader, settings.embedder(), rrf_k=settings.rrf_k,
        reranker=settings.reranker(), rerank_depth=settings.rerank_depth,
    )
    hits = searcher.search(args.query, args.k, mode=args.mode)
    if args.json:
        print(json.dumps(
            [h.__dict__ | {"trail": list(h.trail)} for h in hits], indent=2, ensure_ascii=False
        ))
        return 0
    if not hits:
        print("no results")
    for h in hits:
        where = " > ".join(h.trail)
        page = f" (page {h.page})" if h.page else ""
        print(f"{h.rank:>2}. {h.score:.3f}  {h.title}  [{h.document_id}]{page}")
        if where:
            print(f"    {where}")
        snippet = " ".join(h.text.split())
        print(f"    {snippet[:240]}{'…' if len(snippet) > 240 else ''}")
    return 0


def _is_loopback(host: str) -> bool:
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def cmd_serve(args: argparse.Namespace) -> int:
    import uvicorn

    from .app import create_app

    settings = _settings(args)
    if not _is_loopback(settings.host):
        print(
            f"sounding: caution: listening on {settings.host}: anyone who can reach port "
            f"{settings.port} can read every indexed passage. Restrict access to this port "
            "as your organisation's policies require.",
            file=sys.stderr,
        )
    uvicorn.run(
        create_app(settings), host=settings.host, port=settings.port, log_level=settings.log_level
    )
    return 0


def _parser() -> argparse.ArgumentParser:
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument(
        "--index", dest="index_dir", metavar="DIR",
        help="index folder (default: $SOUNDING_INDEX_DIR or ./sounding-index)",
    )
    common.add_argument(
        "--model", dest="model_path", metavar="PATH",
        help="local sentence-transformers folder (default: the bundled all-MiniLM-L6-v2)",
    )
    fmt = argparse.RawDescriptionHelpFormatter
    parser = argparse.ArgumentParser(
        prog="sounding",
        description="Meaning-based search over a team's documents.",
        epilog="example:\n  sounding index demo_corpus && sounding search 'who is on call?'",
        formatter_class=fmt,
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)

    p = sub.add_parser(
        "index", parents=[common], formatter_class=fmt,
        help="build or refresh the index from folders or files",
        description="Build or refresh the index. Unchanged documents are not re-embedded; "
        "documents gone from a folder are removed from the index.",
        epilog="example:\n  sounding index ~/wiki-export --index /srv/sounding/index",
    )
    p.add_argument("paths", nargs="+", metavar="PATH", help="folders or files to index")
    p.add_argument("--rebuild", action="store_true",
                   help="discard the index and build it anew (after changing model or chunking)")
    p.add_argument("--collection", metavar="NAME",
                   help="collection name for these paths (default: each folder's name)")
    p.add_argument("--json", action="store_true", help="print the report as JSON")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.set_defaults(func=cmd_index)

    p = sub.add_parser(
        "search", parents=[common], formatter_class=fmt,
        help="search the index from the shell",
        description="Print the passages that best match QUERY.",
        epilog="example:\n  sounding search 'how do I restore the database?' -k 3",
    )
    p.add_argument("query", metavar="QUERY")
    p.add_argument("-k", type=int, default=5, metavar="N", help="passages to show (default 5)")
    p.add_argument("--mode", choices=["dense", "lexical", "hybrid"], default="hybrid",
                   help="dense (meaning), lexical (BM25 words) or hybrid (both; default)")
    p.add_argument("--json", action="store_true", help="print results as JSON")
    p.set_defaults(func=cmd_search)

    p = sub.add_parser(
        "serve", parents=[common], formatter_class=fmt,
        help="start the REST service",
        description="Serve the index over HTTP (OpenAPI schema at /openapi.json, docs at /docs).",
        epilog="example:\n  sounding serve --port 8757\n"
        "  curl -s localhost:8757/search -H 'content-type: application/json' "
        "-d '{\"query\": \"who is on call?\", \"k\": 3}'",
    )
    p.add_argument("--host", help="address to bind (default 127.0.0.1)")
    p.add_argument("--port", type=int, help="port (default 8757)")
    p.set_defaults(func=cmd_serve)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``sounding`` console script."""
    args = _parser().parse_args(argv)
    try:
        return int(args.func(args))
    except SoundingError as exc:
        print(f"sounding: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("sounding: interrupted; the index keeps its last complete state", file=sys.stderr)
        return EXIT_INTERRUPTED
    except Exception as exc:  # one line, not a traceback, unless asked
        if os.environ.get("SOUNDING_DEBUG"):
            raise
        print(
            f"sounding: unexpected error: {type(exc).__name__}: {exc} "
            "(set SOUNDING_DEBUG=1 for a traceback)",
            file=sys.stderr,
        )
        return EXIT_UNEXPECTED


if __name__ == "__main__":
    sys.exit(main())
