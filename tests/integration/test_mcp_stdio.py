"""``sounding mcp``: the tools over stdio, spawned by the SDK's own client as an assistant would.

The command runs in a child process with the seeded fake encoder patched in (the bundled
model is not what this is about), on an index built here with the same fake.
"""

from __future__ import annotations

import os
import sys
from pathlib import Path
from typing import Any

import anyio
import pytest
from mcp import ClientSession, StdioServerParameters, stdio_client
from sounding.indexer.build import refresh_index
from sounding.indexer.embedding import HashingEmbedder
from sounding.service.keys import KeyStore
from sounding.service.settings import ServiceSettings

from tests.serving import write_pages
from tests.unit.test_mcp import MARKER, PAGES, SECRET_ID

REPO = Path(__file__).resolve().parents[2]
# The fake must be the one the index was built with (same dimension and seed).
LAUNCH = (
    "import sys\n"
    "from sounding.indexer.embedding import HashingEmbedder\n"
    "from sounding.indexer.settings import IndexSettings\n"
    "IndexSettings.embedder = lambda self: HashingEmbedder(32, seed=3)\n"
    "from sounding.cli import main\n"
    "sys.exit(main(sys.argv[1:]))\n"
)


@pytest.fixture(scope="module")
def index(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, dict[str, Path]]:
    """An index of the test pages, and key files: 'ops' (no group) and 'hr'."""
    tmp = tmp_path_factory.mktemp("stdio")
    write_pages(tmp / "wiki", PAGES)
    settings = ServiceSettings(index_dir=tmp / "index")
    refresh_index([tmp / "wiki"], settings, HashingEmbedder(32, seed=3))
    files = {}
    with KeyStore(settings.keys_file) as store:
        for name, groups in (("ops", ""), ("hr", "hr")):
            files[name] = tmp / f"{name}.key"
            files[name].write_text(store.create(name, "read", groups)[1] + "\n")
    return settings.index_dir, files


def _env() -> dict[str, str]:
    return {k: v for k, v in os.environ.items() if not k.startswith("SOUNDING_")}


def _calls(index_dir: Path, *options: str) -> list[Any]:
    params = StdioServerParameters(
        command=sys.executable,
        args=["-c", LAUNCH, "mcp", "--index", str(index_dir), *options],
        env=_env(),
        cwd=REPO,
    )

    async def main() -> list[Any]:
        with open(os.devnull, "w") as quiet:  # the child's log lines
            async with (
                stdio_client(params, errlog=quiet) as (read, write),
                ClientSession(read, write) as client,
            ):
                await client.initialize()
                return [
                    await client.list_tools(),
                    await client.call_tool("search", {"query": MARKER, "mode": "lexical"}),
                    await client.call_tool("get_document", {"id": SECRET_ID}),
                    await client.call_tool("search", {"query": "pump", "k": 0}),
                    await client.call_tool("context", {"query": "inlet valve", "budget": 100}),
                ]

    return anyio.run(main)


@pytest.mark.slow  # three children, each importing torch: about 30 s on 2 busy cores
@pytest.mark.subprocess
def test_stdio_serves_the_tools_with_the_keys_groups(index: tuple[Path, dict[str, Path]]) -> None:
    index_dir, keys = index
    listed, found, doc, bad, context = _calls(index_dir, "--key-file", str(keys["ops"]))
    assert {t.name for t in listed.tools} == {"search", "context", "get_document"}
    assert found.structured_content["results"] == []  # the hr page is not the key's
    assert doc.is_error and doc.content[0].text == f"no document with id {SECRET_ID!r} in the index"
    assert bad.is_error and bad.content[0].text == "k=0 must be 1 or more"
    assert "Source: Pump restart" in context.content[0].text

    _, found, doc, *_ = _calls(index_dir, "--key-file", str(keys["hr"]))
    assert {r["document_id"] for r in found.structured_content["results"]} == {SECRET_ID}
    assert not doc.is_error and MARKER in doc.content[0].text

    _, found, doc, *_ = _calls(index_dir, "--anonymous")  # unrestricted documents only
    assert found.structured_content["results"] == [] and doc.is_error
