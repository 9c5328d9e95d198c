"""What every command shares: the index and model options, settings, the progress bar.

Nothing here imports torch, FAISS or the service at import time, so that
``sounding --help`` stays fast; commands import what they need when they run.
"""

from __future__ import annotations

import sys
from collections.abc import Callable
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
    from sounding.service.settings import ServiceSettings

    given = {name: value for name, value in overrides.items() if value is not None}
    try:
        return ServiceSettings(**given)
    except ValueError as exc:  # pydantic's ValidationError is a ValueError
        raise SettingsError(f"invalid setting: {exc}".replace("\n", " ")) from exc


def progress_bar() -> Callable[[int, int], None] | None:
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
