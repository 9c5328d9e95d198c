"""``sounding serve``: the REST service over the index."""

from __future__ import annotations

import click

from ._common import example, index_and_model, settings


@click.command(
    "serve",
    short_help="start the REST service",
    help="Serve the index over HTTP: search page at /, OpenAPI schema at /openapi.json.",
    epilog=example(
        "example:\n  sounding serve --port 8757\n"
        "  KEY=$(sounding keys create --name me --scope read)\n"
        '  curl -s localhost:8757/search -H "Authorization: Bearer $KEY" \\\n'
        '       -H \'content-type: application/json\' -d \'{"query": "who is on call?", "k": 3}\'\n'
        "  sounding search 'who is on call?' --server http://127.0.0.1:8757  "
        "# with SOUNDING_API_KEY=$KEY"
    ),
)
@index_and_model
@click.option("--host", help="address to bind (default 127.0.0.1)")
@click.option("--port", type=int, help="port (default 8757)")
def serve_command(
    index_dir: str | None, model_path: str | None, host: str | None, port: int | None
) -> int:
    import uvicorn

    from sounding.service.app import create_app
    from sounding.service.logs import log_config

    config = settings(index_dir=index_dir, model_path=model_path, host=host, port=port)
    config.check_access()  # exit 2 before anything starts when keys are off beyond loopback
    if not config.on_loopback:
        click.echo(
            f"sounding: caution: listening on {config.host}: every endpoint but /health "
            "needs an API key, but keys travel in clear over plain HTTP; put TLS in front of "
            f"port {config.port} as your organisation's policies require.",
            err=True,
        )
    # uvicorn's access log is off: the app writes its own access lines (route templates,
    # request ids; no paths or query strings), in the format of every other line.
    uvicorn.run(
        create_app(config),
        host=config.host,
        port=config.port,
        log_level=config.log_level,
        log_config=log_config(config.log_level, config.log_format),
        access_log=False,
    )
    return 0


COMMANDS = (serve_command,)
