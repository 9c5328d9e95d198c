"""Settings of the REST service, from the environment (prefix ``SOUNDING_``)."""

from __future__ import annotations

import ipaddress
from pathlib import Path
from typing import Literal

from pydantic import Field, field_validator
from sounding.indexer.errors import SettingsError
from sounding.indexer.settings import IndexSettings


class ServiceSettings(IndexSettings):
    """Index settings plus where the service listens and what it accepts.

    The default host is loopback on purpose, and API keys are required
    (``require_keys``) wherever the service listens; keys travel in clear, so
    bind to another address only behind TLS and the access rules your
    organisation requires.
    """

    host: str = Field("127.0.0.1", description="Address to listen on; loopback by default.")
    port: int = Field(8757, ge=1, le=65535, description="TCP port to listen on.")
    max_query_chars: int = Field(
        4000,
        ge=1,
        description="Longest query accepted, in characters. Real questions run to 2,000 "
        "and more. The encoder reads its window (256 word pieces for MiniLM, roughly 1,000 "
        "characters of English); the lexical ranking reads past it, up to its first 64 "
        "content words (lexical.query_terms).",
    )
    max_k: int = Field(100, ge=1, le=1000, description="Most passages one search may ask for.")
    max_context_tokens: int = Field(
        8192, ge=1, description="Largest budget of a /context request, in encoder tokens."
    )
    max_context_chars: int = Field(
        32768, ge=1, description="Largest budget of a /context request, in characters."
    )
    reload_check_seconds: float = Field(
        2.0, ge=0, description="How often the service looks for a newer index generation."
    )
    log_level: str = Field("info", description="uvicorn log level.")
    log_format: Literal["json", "text"] = Field(
        "json", description="Log lines of `sounding serve`: one JSON object each, or plain text."
    )
    max_body_bytes: int = Field(
        64 * 1024, ge=1, description="Largest request body accepted, in bytes; larger is a 413."
    )
    search_threads: int = Field(
        1,
        ge=1,
        le=256,
        description="FAISS threads per query. One: requests already run in "
        "parallel, and more threads per query made single queries several times slower on a "
        "busy 2-core machine (tests/bench/vectors.py).",
    )
    query_threads: int = Field(
        1,
        ge=1,
        le=256,
        description="Torch threads of the service's encoder (queries, pushes). "
        "One: with a nightly re-index using every core beside it, a query's encoding took "
        "400 ms at two threads and 10 ms at one (tests/bench/encode.py on 2 cores).",
    )
    query_batch: int = Field(
        8,
        ge=1,
        le=256,
        description="Most concurrent queries encoded in one encoder call. One turns "
        "batching off: each request encodes its own query in its own thread, as before.",
    )
    query_batch_wait_ms: float = Field(
        2.0,
        ge=0,
        le=100,
        description="How long the encoder waits for a fuller batch, in milliseconds, and only "
        "while other requests are under way: a lone query never waits.",
    )
    query_idle_threads: int = Field(
        0,
        ge=0,
        le=256,
        description="Torch threads for a lone query while no other request is under way "
        "and the machine's 1-minute load average leaves half a core free (0: every usable "
        "core). Batches, and queries on a busy machine, use query_threads. Applies only "
        "with batching on (query_batch above 1).",
    )
    max_upload_bytes: int = Field(
        20 * 2**20, ge=1, description="Largest document accepted by PUT /documents/{id}, in bytes."
    )
    push_collection: str = Field(
        "pushed",
        min_length=1,
        description="Collection of documents pushed with PUT "
        "/documents/{id} that name none. Keep it apart from the folders' collections: a folder "
        "run removes documents of its collection that are not in the folder.",
    )
    push_wait_seconds: float = Field(
        10.0,
        ge=0,
        le=600,
        description="How long a push waits for a running re-index before "
        "answering 503 with Retry-After.",
    )
    collection_urls: dict[str, str] = Field(
        default_factory=dict,
        description="Where people read each collection, as JSON: collection name to base "
        'URL, e.g. {"wiki": "https://wiki.example.org/"}. Results of that collection link '
        "to the base followed by the document's path in the collection; a base holding "
        "{path} or {stem} (the path without its suffix) is a template instead.",
    )
    max_json_depth: int = Field(
        32, ge=1, le=1000, description="Deepest nesting of a JSON body accepted; deeper is a 422."
    )
    require_keys: bool = Field(
        True,
        description="Every endpoint but /health needs an API key. May be false only when the "
        "service listens on loopback: then callers without a key see unrestricted documents.",
    )
    timing_header: bool = Field(
        False,
        description="Send every caller the Server-Timing header of /search (milliseconds per "
        "stage). Off: only admin keys get it, since a stage's time can tell whether a word "
        "occurs in pages the caller may not read. The debug log has the stages either way.",
    )
    keys_path: Path | None = Field(
        None, description="SQLite file of API keys; empty means keys.db in the index folder."
    )

    @field_validator("collection_urls")
    @classmethod
    def _web_addresses(cls, urls: dict[str, str]) -> dict[str, str]:
        for name, url in urls.items():
            if not url.startswith(("https://", "http://")):
                raise ValueError(f"collection_urls[{name!r}] = {url!r} is not an http(s) address")
        return urls

    @property
    def keys_file(self) -> Path:
        """Where API keys (their salted hashes) are kept."""
        from .keys import FILENAME

        return self.keys_path or self.index_dir / FILENAME

    @property
    def on_loopback(self) -> bool:
        """Whether ``host`` is a loopback address (or ``localhost``): only this machine."""
        if self.host == "localhost":
            return True
        try:
            return ipaddress.ip_address(self.host).is_loopback
        except ValueError:  # any other name may resolve to a reachable address
            return False

    def check_access(self) -> None:
        """Refuse to serve without keys anywhere but loopback (SettingsError)."""
        if not self.require_keys and not self.on_loopback:
            raise SettingsError(
                f"require_keys is false but the service would listen on {self.host}: keys may "
                "be turned off only on loopback (127.0.0.1); unset SOUNDING_REQUIRE_KEYS "
                "or listen on 127.0.0.1"
            )

    def searcher_factory(self, embedder):  # -> Callable[[IndexReader], Searcher]
        """Make searchers over readers with these settings' ranking options.

        The indexer's one searcher builder (:func:`sounding.indexer.settings.searcher_factory`):
        the reranker, if configured, loads once there and serves every searcher.
        """
        from sounding.indexer.settings import searcher_factory

        return searcher_factory(self, embedder)
