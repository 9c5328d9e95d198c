"""Fuzz the REST API with a large schemathesis budget and print what came back.

    python tests/bench/fuzz.py [--examples 500] [--seed 0] [--verbose]

Builds a small index with the seeded fake encoder in a scratch folder, serves
it with a real uvicorn server, and sends every operation of the service's own
OpenAPI schema ``--examples`` valid (positive) and as many invalid (negative)
requests. Prints, per operation and mode, the number of requests, the status
codes seen and the failed checks (no 5xx; responses match the schema), with
one example request per kind of failure. Exit code 1 when anything failed.
``tests/integration/test_fuzz.py`` runs the same checks with a small budget.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from collections import Counter
from pathlib import Path

import schemathesis
from hypothesis import HealthCheck, given, settings
from hypothesis import seed as hypothesis_seed
from hypothesis.errors import Unsatisfiable
from schemathesis import GenerationMode
from schemathesis.core import NOT_SET
from schemathesis.core.failures import FailureGroup

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from sounding.service.app import create_app  # noqa: E402

from tests.integration.test_fuzz import CHECKS, build_wiki  # noqa: E402
from tests.serving import running  # noqa: E402


def fuzz_operation(operation, mode: GenerationMode, examples: int, seed: int):
    """Run one operation's strategy; return status counts, one example per status,
    failures and the number of requests."""
    statuses: Counter[int] = Counter()
    seen: dict[int, str] = {}  # status -> one example request and answer
    failures: dict[str, str] = {}  # failure kind -> one example request
    sent = 0

    @settings(
        max_examples=examples,
        deadline=None,
        database=None,
        suppress_health_check=list(HealthCheck),
    )
    @hypothesis_seed(seed)  # seeded, so a figure can be reproduced
    @given(case=operation.as_strategy(generation_mode=mode))
    def run(case) -> None:
        nonlocal sent
        sent += 1
        try:
            response = case.call(timeout=30)
        except Exception as exc:  # noqa: BLE001 - a dropped connection is a finding too
            failures.setdefault(f"transport: {type(exc).__name__}", repr(case))
            return
        statuses[response.status_code] += 1
        seen.setdefault(response.status_code, f"{_request(case)} -> {response.text[:160]}")
        try:
            case.validate_response(response, checks=CHECKS)
        except FailureGroup as group:  # count every failed check, do not stop
            for exc in group.exceptions:
                kind = f"{type(exc).__name__}: {getattr(exc, 'title', '')}"
                failures.setdefault(kind, f"{_request(case)} -> {response.status_code}")

    run()
    return statuses, seen, failures, sent


def _request(case) -> str:
    body = "" if case.body is None or case.body is NOT_SET else f" {case.media_type} {case.body!r}"
    return f"{case.method} {case.formatted_path}{body}"[:300]


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--examples", type=int, default=500, help="per operation and mode")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--verbose", action="store_true", help="one example per status code")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        settings_, embedder = build_wiki(Path(tmp), max_body_bytes=4096)
        with running(create_app(settings_, embedder=embedder)) as base:
            schema = schemathesis.openapi.from_url(f"{base}/openapi.json")
            total_sent = total_failed = 0
            started = time.perf_counter()
            for result in schema.get_all_operations():
                op = result.ok()
                for mode in (GenerationMode.POSITIVE, GenerationMode.NEGATIVE):
                    label = f"{op.method.upper()} {op.path} [{mode.value}]"
                    try:
                        statuses, seen, failures, sent = fuzz_operation(
                            op, mode, args.examples, args.seed
                        )
                    except Unsatisfiable:
                        print(f"{label:45} not run: no input that can be made invalid")
                        continue
                    total_sent += sent
                    total_failed += len(failures)
                    shown = ", ".join(f"{code}: {n}" for code, n in sorted(statuses.items()))
                    print(f"{label:45} {sent:5} requests  {shown}")
                    if args.verbose:
                        for code, example in sorted(seen.items()):
                            print(f"    {code} e.g. {example}")
                    for kind, example in failures.items():
                        print(f"    FAIL {kind}\n         e.g. {example}")
            seconds = time.perf_counter() - started
    print(f"{total_sent} requests in {seconds:.1f} s; {total_failed} kinds of failure")
    return 1 if total_failed else 0


if __name__ == "__main__":
    sys.exit(main())
