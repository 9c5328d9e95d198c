"""``sounding eval`` and ``sounding judgments export``: measure ranking quality."""

from __future__ import annotations

import json
from pathlib import Path

import click

from sounding.indexer.errors import SettingsError

from ._common import example, index_and_model, settings, stage_bars

MODES = ("dense", "lexical", "hybrid")


def _print_comparison(a: Path, b: Path, qrels: Path, as_json: bool) -> None:
    from sounding.indexer.evaluation import read_qrels, read_run
    from sounding.indexer.experiment import compare_runs

    rows = compare_runs(read_run(a), read_run(b), read_qrels(qrels))
    if as_json:
        click.echo(
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
        return
    click.echo(f"A = {a}\nB = {b}  (wins/losses: queries where B is better/worse)")
    click.echo(
        f"{'metric':<11}{'A':>8}{'B':>8}{'B-A':>9}{'wins':>6}{'losses':>7}{'ties':>6}"
        f"{'t-test p':>10}{'rand. p':>9}"
    )
    for r in rows:
        click.echo(
            f"{r.metric:<11}{r.mean_a:>8.4f}{r.mean_b:>8.4f}{r.difference:>+9.4f}"
            f"{r.wins:>6}{r.losses:>7}{r.ties:>6}{r.t_test.p_value:>10.4f}"
            f"{r.randomisation.p_value:>9.4f}"
        )


@click.command(
    "eval",
    short_help="measure ranking quality on judged queries (nDCG@10, Recall@100, MRR@10, MAP)",
    help="Index a BEIR-layout folder (corpus.jsonl, queries.jsonl, qrels.tsv) into a "
    "scratch index, or use --index, or keep and reuse it in --cache; rank every judged query "
    "with the configured searcher (re-ranker included) and score the ranking with "
    "pytrec_eval. With --compare, compare two TREC run files query by query.",
    epilog=example(
        "examples:\n  sounding eval ../shared/benchmarks/scifact --mode hybrid --json\n"
        "  sounding eval data/scifact --index /tmp/sf --mode dense --run-out dense.run\n"
        "  sounding eval data/scifact --cache ~/.cache/sounding-eval --mode lexical\n"
        "  sounding eval --compare dense.run hybrid.run --qrels data/scifact/qrels.tsv"
    ),
)
@click.argument("dataset", required=False, metavar="[DATASET_DIR]")
@index_and_model
@click.option(
    "--mode",
    type=click.Choice(MODES),
    default="hybrid",
    help="dense (meaning), lexical (BM25 words) or hybrid (both; default)",
)
@click.option("--k", "k", type=int, default=100, help="documents ranked per query (default 100)")
@click.option(
    "--cache",
    "cache_dir",
    metavar="DIR",
    help="keep the built index in DIR and reuse it while the corpus, encoder and chunk "
    "settings are the same (default: $SOUNDING_EVAL_CACHE, else a scratch index)",
)
@click.option("--run-out", metavar="FILE", help="write the ranking as a TREC run file")
@click.option(
    "--compare",
    nargs=2,
    metavar="A.run B.run",
    default=None,
    help="compare two run files instead of evaluating",
)
@click.option("--qrels", metavar="FILE", help="judgments for --compare (qrels.tsv)")
@click.option("--json", "as_json", is_flag=True, help="print one JSON object")
def eval_command(
    dataset: str | None,
    index_dir: str | None,
    model_path: str | None,
    mode: str,
    k: int,
    cache_dir: str | None,
    run_out: str | None,
    compare: tuple[str, str] | None,
    qrels: str | None,
    as_json: bool,
) -> int:
    if compare:
        if not qrels:
            raise SettingsError(
                "--compare needs --qrels FILE (the judgments both runs are scored on)"
            )
        a, b = (Path(p) for p in compare)
        _print_comparison(a, b, Path(qrels), as_json)
        return 0
    if not dataset:
        raise SettingsError("name a BEIR-layout folder to evaluate, or use --compare A.run B.run")
    from sounding.indexer.evaluation import write_run
    from sounding.indexer.experiment import evaluate_collection

    config = settings(index_dir=index_dir, model_path=model_path, eval_cache=cache_dir)
    folder = Path(dataset)
    if not folder.is_dir():
        raise SettingsError(f"dataset folder does not exist: {folder}")
    # --index names an index to use; only without it does the (configured) cache apply.
    result = evaluate_collection(
        folder,
        mode,
        config,
        config.embedder(),
        k=k,
        index_dir=Path(index_dir) if index_dir else None,
        cache_dir=None if index_dir and not cache_dir else config.eval_cache,
        progress=stage_bars({"indexing": ("indexing", "chunk"), "queries": ("queries", "query")}),
    )
    if run_out:
        write_run(result.run, Path(run_out), tag=f"sounding-{result.mode}")
    if as_json:
        click.echo(json.dumps(result.to_json()))
    else:
        summary = result.to_json()
        click.echo(f"{folder} mode={result.mode} queries={summary['queries']}")
        for name in ("ndcg@10", "recall@100", "mrr@10", "map"):
            click.echo(f"  {name:<11}{summary[name]:.4f}")
        if run_out:
            click.echo(f"run written to {run_out}")
    return 0


@click.group(
    "judgments",
    short_help="export judgments collected by POST /feedback as a test set",
    help="Write the judgments collected from use as queries.jsonl and qrels.tsv "
    "(BEIR layout) for `sounding eval`.",
    epilog=example(
        "example:\n  sounding judgments export team-set && "
        "sounding eval team-set --index ./sounding-index"
    ),
    no_args_is_help=False,
    subcommand_metavar="ACTION [ARGS]...",
)
@index_and_model
@click.pass_context
def judgments_group(ctx: click.Context, index_dir: str | None, model_path: str | None) -> None:
    # `sounding judgments --index DIR export OUT` works as well as `... export OUT --index DIR`.
    ctx.obj = {"index_dir": index_dir, "model_path": model_path}


@judgments_group.command(
    "export",
    short_help="write queries.jsonl and qrels.tsv",
    help="Write queries.jsonl and qrels.tsv of every judged query into OUT_DIR.",
    epilog=example("example:\n  sounding judgments export team-set"),
)
@click.argument("out", metavar="OUT_DIR")
@index_and_model
@click.pass_obj
def export_command(
    given: dict | None, out: str, index_dir: str | None, model_path: str | None
) -> int:
    from sounding.indexer.judgments import JudgmentStore

    given = given or {}
    config = settings(
        index_dir=index_dir or given.get("index_dir"),
        model_path=model_path or given.get("model_path"),
    )
    path = config.judgments_file
    if not path.is_file():
        raise SettingsError(f"no judgments file at {path}; send judgments with POST /feedback")
    store = JudgmentStore(path)
    try:
        queries, pairs = store.export(Path(out))
    finally:
        store.close()
    click.echo(
        f"wrote {queries} queries and {pairs} judgments to {out}/queries.jsonl and "
        f"{out}/qrels.tsv; evaluate with `sounding eval {out} --index DIR`"
    )
    return 0


COMMANDS = (eval_command, judgments_group)
