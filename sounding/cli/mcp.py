"""``sounding mcp``: the assistant tools (Model Context Protocol) on stdin/stdout."""

from __future__ import annotations

import click

from sounding.indexer.errors import SettingsError

from ._common import example, index_and_model, settings


@click.command(
    "mcp",
    short_help="serve the assistant tools (MCP) on stdin/stdout",
    help="Serve the index's tools (search, context, get_document) to an assistant on this "
    "machine over the Model Context Protocol's stdio transport: the assistant starts this "
    "command and talks to it on stdin/stdout. Every call sees what the key may read (its "
    "groups, looked up in the index's keys.db and checked again on each call); without a "
    "key it refuses to start, unless --anonymous asks for the unrestricted documents only. "
    "Logs go to stderr. A running `sounding serve` offers the same tools at /mcp.",
    epilog=example(
        "examples:\n  sounding keys create --name my-assistant --scope read --groups ops "
        "> ~/.sounding-key\n"
        "  sounding mcp --index ./sounding-index --key-file ~/.sounding-key\n"
        "  sounding mcp --index ./sounding-index --anonymous"
    ),
)
@index_and_model
@click.option(
    "--key-file",
    metavar="FILE",
    envvar="SOUNDING_API_KEY_FILE",
    help="file holding the API key whose groups apply (default: $SOUNDING_API_KEY_FILE, "
    "else the key in $SOUNDING_API_KEY)",
)
@click.option(
    "--anonymous",
    is_flag=True,
    help="serve without a key: unrestricted documents only",
)
def mcp_command(
    index_dir: str | None, model_path: str | None, key_file: str | None, anonymous: bool
) -> int:
    import logging.config

    import anyio

    from sounding.service.logs import log_config
    from sounding.service.mcp import serve_stdio

    from ._client import api_key

    config = settings(index_dir=index_dir, model_path=model_path)
    secret = api_key(key_file)
    # Fail closed: a forgotten key must not quietly become "everything unrestricted".
    if secret is None and not anonymous:
        raise SettingsError(
            "sounding mcp needs a key: --key-file FILE (or SOUNDING_API_KEY_FILE, "
            "SOUNDING_API_KEY) holding one from `sounding keys create --scope read`; or "
            "--anonymous for the unrestricted documents only"
        )
    if secret is not None and anonymous:
        raise SettingsError("--anonymous and a key exclude each other; give one of them")
    logging.config.dictConfig(log_config(config.log_level, config.log_format))  # to stderr
    anyio.run(serve_stdio, config, secret)
    return 0


COMMANDS = (mcp_command,)
