"""The ``sounding`` command: thin wrappers over library calls.

Each command parses its options, calls one function, and turns sounding's
own errors into one line on stderr and a non-zero exit code.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
from collections.abc import Callable, Sequence
from pathlib import Path

from sounding.indexer.errors import SettingsError, SoundingError

EXIT_UNEXPECTED = 70
EXIT_INTERRUPTED = 130


def _settings(args: argparse.Namespace):
    from sounding.service.settings import ServiceSettings

    overrides = {}
    for name in ("index_dir", "model_path", "host", "port", "keys_path"):
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
    from sounding.indexer.build import refresh_index

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
        max_runtime=args.max_runtime,
    )
    if args.json:
        print(json.dumps(report.to_json(), indent=2))
    else:
        print(report.summary())
        for s in report.skipped:
            print(f"skipped {s.path}: {s.reason}")
    if report.lock_taken_over:
        print(
            "sounding: note: the previous run died holding the lock; this run took it over",
            file=sys.stderr,
        )
    if report.documents == 0:
        print(
            "sounding: error: nothing could be indexed; see the skipped files above",
            file=sys.stderr,
        )
        return 1
    return 0


def cmd_search(args: argparse.Namespace) -> int:
    from sounding.indexer.search import SearchFilter
    from sounding.indexer.store import IndexReader

    settings = _settings(args)
    reader = IndexReader(settings.index_dir)
    searcher = settings.searcher_factory(settings.embedder())(reader)
    # The shell reads the index folder itself, so it sees every document (no groups).
    where = SearchFilter(
        collections=tuple(args.collection or ()),
        tags=tuple(args.tag or ()),
        source_prefix=args.under,
    )
    hits = searcher.search(args.query, args.k, mode=args.mode, where=where)
    if args.json:
        print(
            json.dumps(
                [h.__dict__ | {"trail": list(h.trail)} for h in hits], indent=2, ensure_ascii=False
            )
        )
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


def cmd_eval(args: argparse.Namespace) -> int:
    from sounding.indexer.evaluation import read_qrels, read_run, write_run
    from sounding.indexer.experiment import compare_runs, evaluate_dataset

    if args.compare:
        if not args.qrels:
            raise SettingsError(
                "--compare needs --qrels FILE (the judgments both runs are scored on)"
            )
        a, b = (Path(p) for p in args.compare)
        rows = compare_runs(read_run(a), read_run(b), read_qrels(Path(args.qrels)))
        if args.json:
            print(
                json.dumps(
                    {
                        r.metric: {
                            "a": round(r.mean_a, 4),
                            "b": round(r.mean_b, 4),
                            "difference": round(r.difference, 4),
                            "wins": r.wins,
                            "losses": r.losses,
                            "ties": r.ties,
                            "t_test_p": r.t_test.p_value,
                            "randomisation_p": r.randomisation.p_value,
                        }
                        for r in rows
                    },
                    indent=2,
                )
            )
            return 0
        print(f"A = {a}\nB = {b}  (wins/losses: queries where B is better/worse)")
        print(
            f"{'metric':<11}{'A':>8}{'B':>8}{'B-A':>9}{'wins':>6}{'losses':>7}{'ties':>6}"
            f"{'t-test p':>10}{'rand. p':>9}"
        )
        for r in rows:
            print(
                f"{r.metric:<11}{r.mean_a:>8.4f}{r.mean_b:>8.4f}{r.difference:>+9.4f}"
                f"{r.wins:>6}{r.losses:>7}{r.ties:>6}{r.t_test.p_value:>10.4f}"
                f"{r.randomisation.p_value:>9.4f}"
            )
        return 0
    if not args.dataset:
        raise SettingsError("name a BEIR-layout folder to evaluate, or use --compare A.run B.run")
    settings = _settings(args)
    dataset = Path(args.dataset)
    if not dataset.is_dir():
        raise SettingsError(f"dataset folder does not exist: {dataset}")
    result = evaluate_dataset(
        dataset,
        settings,
        settings.embedder(),
        mode=args.mode,
        k=args.k,
        index_dir=Path(args.index_dir) if args.index_dir else None,
    )
    if args.run_out:
        write_run(result.run, Path(args.run_out), tag=f"sounding-{result.mode}")
    if args.json:
        print(json.dumps(result.to_json()))
    else:
        summary = result.to_json()
        print(f"{dataset} mode={result.mode} queries={summary['queries']}")
        for name in ("ndcg@10", "recall@100", "mrr@10", "map"):
            print(f"  {name:<11}{summary[name]:.4f}")
        if args.run_out:
            print(f"run written to {args.run_out}")
    return 0


def cmd_check(args: argparse.Namespace) -> int:
    from sounding.indexer.check import check_index, repair_index

    settings = _settings(args)
    report = (repair_index if args.repair else check_index)(settings.index_dir)
    for line in report.repaired:
        print(f"repaired: {line}")
    for problem in report.problems:
        print(f"problem: {problem}")
    for note in report.notes:
        print(f"note: {note}")
    if report.ok:
        print(f"index at {settings.index_dir} is consistent")
        return 0
    if not args.repair:
        print("run `sounding check --repair` to rebuild what can be derived", file=sys.stderr)
    return 1


def cmd_judgments(args: argparse.Namespace) -> int:
    from sounding.indexer.judgments import JudgmentStore

    settings = _settings(args)
    path = settings.judgments_file
    if not path.is_file():
        raise SettingsError(f"no judgments file at {path}; send judgments with POST /feedback")
    store = JudgmentStore(path)
    try:
        queries, pairs = store.export(Path(args.out))
    finally:
        store.close()
    print(
        f"wrote {queries} queries and {pairs} judgments to {args.out}/queries.jsonl and "
        f"{args.out}/qrels.tsv; evaluate with `sounding eval {args.out} --index DIR`"
    )
    return 0


def cmd_serve(args: argparse.Namespace) -> int:
    import uvicorn

    from sounding.service.app import create_app
    from sounding.service.logs import log_config

    settings = _settings(args)
    settings.check_access()  # exit 2 before anything starts when keys are off beyond loopback
    if not settings.on_loopback:
        print(
            f"sounding: caution: listening on {settings.host}: every endpoint but /health "
            "needs an API key, but keys travel in clear over plain HTTP; put TLS in front of "
            f"port {settings.port} as your organisation's policies require.",
            file=sys.stderr,
        )
    # uvicorn's access log is off: the app writes its own access lines (route templates,
    # request ids; no paths or query strings), in the format of every other line.
    uvicorn.run(
        create_app(settings),
        host=settings.host,
        port=settings.port,
        log_level=settings.log_level,
        log_config=log_config(settings.log_level, settings.log_format),
        access_log=False,
    )
    return 0


def cmd_keys_create(args: argparse.Namespace) -> int:
    from sounding.service.keys import KeyStore

    settings = _settings(args)
    with KeyStore(settings.keys_file) as store:
        record, secret = store.create(args.name, args.scope, args.groups, args.act_for)
    print(secret)
    groups = ",".join(sorted(record.groups)) or "none"
    print(
        f"sounding: created key {record.name!r} (id {record.id}, scope {record.scope}, "
        f"groups {groups}{', act-for' if record.act_for else ''}); store the secret above "
        "safely now: it is not shown again",
        file=sys.stderr,
    )
    return 0


def cmd_keys_list(args: argparse.Namespace) -> int:
    from sounding.service.keys import KeyStore

    settings = _settings(args)
    if not settings.keys_file.is_file():
        raise SettingsError(
            f"no keys file at {settings.keys_file}; create a key with "
            "`sounding keys create --name NAME --scope read`"
        )
    with KeyStore(settings.keys_file) as store:
        records = store.list()
    if args.json:
        print(json.dumps([r.to_json() for r in records], indent=2))
        return 0
    if not records:
        print("no keys")
    for r in records:
        j = r.to_json()
        state = f"revoked {j['revoked_at']}" if r.revoked else "live"
        print(
            f"{r.id}  {r.name:<20} {r.scope:<5}  groups={','.join(j['groups']) or '-'}"
            f"{'  act-for' if r.act_for else ''}  created {j['created_at']}  {state}"
        )
    return 0


def cmd_keys_revoke(args: argparse.Namespace) -> int:
    from sounding.service.keys import KeyStore

    settings = _settings(args)
    if not settings.keys_file.is_file():
        raise SettingsError(f"no keys file at {settings.keys_file}; nothing to revoke")
    with KeyStore(settings.keys_file) as store:
        before = {r.id: r.revoked for r in store.list()}
        record = store.revoke(args.key)
    if before.get(record.id):
        print(f"key {record.name!r} ({record.id}) was revoked already")
    else:
        print(
            f"revoked key {record.name!r} ({record.id}); a running service refuses it "
            "from its next request"
        )
    return 0


def _parser() -> argparse.ArgumentParser:
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument(
        "--index",
        dest="index_dir",
        metavar="DIR",
        help="index folder (default: $SOUNDING_INDEX_DIR or ./sounding-index)",
    )
    common.add_argument(
        "--model",
        dest="model_path",
        metavar="PATH",
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
        "index",
        parents=[common],
        formatter_class=fmt,
        help="build or refresh the index from folders or files",
        description="Build or refresh the index. Unchanged documents are not re-embedded; "
        "documents gone from a folder are removed from the index.",
        epilog="example:\n  sounding index ~/wiki-export --index /srv/sounding/index\n"
        "exit codes: 0 done, 1 nothing indexable, 2 bad argument, 3 model, 4 index, "
        "75 another run holds the index",
    )
    p.add_argument("paths", nargs="+", metavar="PATH", help="folders or files to index")
    p.add_argument(
        "--rebuild",
        action="store_true",
        help="discard the index and build it anew (after changing model or chunking)",
    )
    p.add_argument(
        "--collection",
        metavar="NAME",
        help="collection name for these paths (default: each folder's name)",
    )
    p.add_argument("--json", action="store_true", help="print the report as JSON")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.add_argument(
        "--max-runtime",
        type=float,
        metavar="SECONDS",
        help="stop cleanly at the first checkpoint after this long; the next run carries on",
    )
    p.set_defaults(func=cmd_index)

    p = sub.add_parser(
        "search",
        parents=[common],
        formatter_class=fmt,
        help="search the index from the shell",
        description="Print the passages that best match QUERY.",
        epilog="examples:\n  sounding search 'how do I restore the database?' -k 3\n"
        "  sounding search 'valve torque' --under runbooks/ --tag pumps",
    )
    p.add_argument("query", metavar="QUERY")
    p.add_argument(
        "--collection",
        action="append",
        metavar="NAME",
        help="only this collection (repeat for several)",
    )
    p.add_argument(
        "--tag",
        action="append",
        metavar="TAG",
        help="only documents with this tag (repeat: any of them)",
    )
    p.add_argument(
        "--under",
        metavar="PREFIX",
        help="only documents whose id or source path starts with PREFIX",
    )
    p.add_argument("-k", type=int, default=5, metavar="N", help="passages to show (default 5)")
    p.add_argument(
        "--mode",
        choices=["dense", "lexical", "hybrid"],
        default="hybrid",
        help="dense (meaning), lexical (BM25 words) or hybrid (both; default)",
    )
    p.add_argument("--json", action="store_true", help="print results as JSON")
    p.set_defaults(func=cmd_search)

    p = sub.add_parser(
        "serve",
        parents=[common],
        formatter_class=fmt,
        help="start the REST service",
        description="Serve the index over HTTP: search page at /, OpenAPI schema at /openapi.json.",
        epilog="example:\n  sounding serve --port 8757\n"
        "  curl -s localhost:8757/search -H 'content-type: application/json' "
        '-d \'{"query": "who is on call?", "k": 3}\'',
    )
    p.add_argument("--host", help="address to bind (default 127.0.0.1)")
    p.add_argument("--port", type=int, help="port (default 8757)")
    p.set_defaults(func=cmd_serve)

    p = sub.add_parser(
        "eval",
        parents=[common],
        formatter_class=fmt,
        help="measure ranking quality on judged queries (nDCG@10, Recall@100, MRR@10, MAP)",
        description="Index a BEIR-layout folder (corpus.jsonl, queries.jsonl, qrels.tsv) into a "
        "scratch index, or use --index, rank every judged query and score the ranking with "
        "pytrec_eval. With --compare, compare two TREC run files query by query.",
        epilog="examples:\n  sounding eval ../shared/benchmarks/scifact --mode hybrid --json\n"
        "  sounding eval data/scifact --index /tmp/sf --mode dense --run-out dense.run\n"
        "  sounding eval --compare dense.run hybrid.run --qrels data/scifact/qrels.tsv",
    )
    p.add_argument("dataset", nargs="?", metavar="DATASET_DIR")
    p.add_argument("--mode", choices=["dense", "lexical", "hybrid"], default="hybrid")
    p.add_argument("--k", type=int, default=100, help="documents ranked per query (default 100)")
    p.add_argument("--run-out", metavar="FILE", help="write the ranking as a TREC run file")
    p.add_argument(
        "--compare",
        nargs=2,
        metavar=("A.run", "B.run"),
        help="compare two run files instead of evaluating",
    )
    p.add_argument("--qrels", metavar="FILE", help="judgments for --compare (qrels.tsv)")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    p.set_defaults(func=cmd_eval)

    p = sub.add_parser(
        "check",
        parents=[common],
        formatter_class=fmt,
        help="verify that the index files agree; --repair rebuilds derived data",
        description="Check that every chunk has a vector and vice versa, that the lexical "
        "index matches the chunks and the manifest the files. Exit 0 when consistent, 1 when "
        "a problem is found (each printed on its own line).",
        epilog="example:\n  sounding check --index /srv/sounding/index || "
        "sounding check --repair --index /srv/sounding/index",
    )
    p.add_argument(
        "--repair",
        action="store_true",
        help="rebuild the vector file and the lexical index from the chunk rows",
    )
    p.set_defaults(func=cmd_check)

    p = sub.add_parser(
        "judgments",
        parents=[common],
        formatter_class=fmt,
        help="export judgments collected by POST /feedback as a test set",
        description="Write the judgments collected from use as queries.jsonl and qrels.tsv "
        "(BEIR layout) for `sounding eval`.",
        epilog="example:\n  sounding judgments export team-set && "
        "sounding eval team-set --index ./sounding-index",
    )
    jsub = p.add_subparsers(dest="action", metavar="ACTION", required=True)
    e = jsub.add_parser(
        "export",
        parents=[common],
        help="write queries.jsonl and qrels.tsv",
        formatter_class=fmt,
        epilog="example:\n  sounding judgments export team-set",
    )
    e.add_argument("out", metavar="OUT_DIR")
    e.set_defaults(func=cmd_judgments)

    keyfile = argparse.ArgumentParser(add_help=False)
    keyfile.add_argument(
        "--index",
        dest="index_dir",
        metavar="DIR",
        help="index folder whose keys.db to use (default: $SOUNDING_INDEX_DIR or ./sounding-index)",
    )
    keyfile.add_argument(
        "--keys",
        dest="keys_path",
        metavar="FILE",
        help="keys file (default: $SOUNDING_KEYS_PATH or DIR/keys.db)",
    )
    p = sub.add_parser(
        "keys",
        formatter_class=fmt,
        help="create, list and revoke API keys",
        description="API keys for the service: each has a scope (read < write < admin), the "
        "groups whose restricted documents it may read, and optionally the act-for right "
        "(send an end user's groups in X-Sounding-On-Behalf-Of). Only a salted scrypt hash "
        "of each key is stored.",
        epilog="examples:\n  sounding keys create --name wiki-search --scope read --groups hr\n"
        "  sounding keys list\n  sounding keys revoke wiki-search",
    )
    ksub = p.add_subparsers(dest="action", metavar="ACTION", required=True)
    k = ksub.add_parser(
        "create",
        parents=[keyfile],
        formatter_class=fmt,
        help="make a key and print its secret once",
        description="Make a key and print its secret on stdout, once: only its hash is kept.",
        epilog="examples:\n  sounding keys create --name ana --scope read --groups hr,finance\n"
        "  sounding keys create --name chat-bot --scope read --act-for > chat-bot.key",
    )
    k.add_argument("--name", required=True, help="unique name: letters, digits, '.', '_', '-'")
    k.add_argument(
        "--scope",
        required=True,
        metavar="read|write|admin",
        help="read: search and read; write: also push and delete documents; admin: everything",
    )
    k.add_argument(
        "--groups",
        metavar="G1,G2",
        default="",
        help="groups whose restricted documents the key may read (default: none)",
    )
    k.add_argument(
        "--act-for",
        action="store_true",
        help="the key may send an end user's groups in X-Sounding-On-Behalf-Of",
    )
    k.set_defaults(func=cmd_keys_create)
    k = ksub.add_parser(
        "list",
        parents=[keyfile],
        formatter_class=fmt,
        help="show every key (never secrets)",
        description="Show every key, live and revoked: id, name, scope, groups, act-for.",
        epilog="example:\n  sounding keys list --json",
    )
    k.add_argument("--json", action="store_true", help="print a JSON list")
    k.set_defaults(func=cmd_keys_list)
    k = ksub.add_parser(
        "revoke",
        parents=[keyfile],
        formatter_class=fmt,
        help="revoke a key by name or id; a running service refuses it at once",
        description="Revoke the live key of that name, or the key of that id.",
        epilog="example:\n  sounding keys revoke chat-bot",
    )
    k.add_argument("key", metavar="NAME", help="a live key's name, or a key id")
    k.set_defaults(func=cmd_keys_revoke)
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
