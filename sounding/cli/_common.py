"""What every command shares: the index and model options, settings, the progress bar.

Nothing here imports torch, FAISS or the service at import time, so that
``sounding --help`` stays fast; commands import what they need when they run.
"""

from __future__ import annotations

import sys
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING, Any, TypeVar

import click

from sounding.indexer.errors import SettingsError

if TYPE_CHECKING:
    from sounding.service.settings import ServiceSettings

F = TypeVar("F", bound=Callable[..., Any])


def example(text: str) -> str:
    """An epilog click prints as written (``\\b`` stops it from re-wrapping the lines)."""
    return "\b\n" + text


def index_option(help: str = "index folder (default: $SOUNDING_INDEX_DIR or ./sounding-index)"):
    """``--index DIR``, passed to the command as ``index_dir``."""
    return click.option("--index", "index_dir", metavar="DIR", default=None, help=help)


def model_option(f: F) -> F:
    """``--model PATH``, passed to the command as ``model_path``."""
    return click.option(
        "--model",
        "model_path",
        metavar="PATH",
        default=None,
        help="local sentence-transformers folder (default: the bundled all-MiniLM-L6-v2)",
    )(f)


def index_and_model(f: F) -> F:
    """The options every index-reading command takes: ``--index`` and ``--model``."""
    return index_option()(model_option(f))


def settings(**overrides: object) -> ServiceSettings:
    """Settings from the environment, with the options the user gave (None: not given)."""
    from pydantic import ValidationError

    from sounding.indexer.settings import settings_problem
    from sounding.service.settings import ServiceSettings

    given = {name: value for name, value in overrides.items() if value is not None}
    try:
        config = ServiceSettings(**given)
    except ValidationError as exc:
        raise SettingsError(settings_problem(exc, given)) from None
    except ValueError as exc:
        raise SettingsError(f"invalid setting: {exc}".replace("\n", " ")) from exc
    check_index_folder(config.index_dir)
    return config


def check_index_folder(index_dir: Path) -> None:
    """A file where the index folder should be fails here, in words, not as a lock error."""
    if index_dir.exists() and not index_dir.is_dir():
        raise SettingsError(
            f"the index folder {index_dir} is a file, not a folder; point --index or "
            "SOUNDING_INDEX_DIR at a folder (a new one is created), or move the file away"
        )


def progress_bar(desc: str = "embedding", unit: str = "chunk") -> Callable[[int, int], None] | None:
    """A tqdm bar on stderr when it is a terminal (cron logs stay clean)."""
    if not sys.stderr.isatty():
        return None
    from tqdm import tqdm

    bar: dict[str, tqdm] = {}

    def update(done: int, total: int) -> None:
        if "bar" not in bar:
            bar["bar"] = tqdm(total=total, unit=unit, desc=desc, file=sys.stderr)
        b = bar["bar"]
        if total != b.total:  # a pipelined run learns its total as its walk goes on
            b.total = total
            b.refresh()
        b.update(done - b.n)
        if done >= total:
            b.close()

    return update


def stage_bars(stages: dict[str, tuple[str, str]]) -> Callable[[str, int, int], None] | None:
    """``progress(stage, done, total)`` drawing one bar per stage (``stage: (desc, unit)``)
    on a terminal, each started when its stage first reports; None off a terminal."""
    if not sys.stderr.isatty():
        return None
    bars: dict[str, Callable[[int, int], None] | None] = {}

    def update(stage: str, done: int, total: int) -> None:
        if stage not in bars:
            desc, unit = stages.get(stage, (stage, "it"))
            bars[stage] = progress_bar(desc, unit)
        bar = bars[stage]
        if bar is not None:
            bar(done, total)

    return update
