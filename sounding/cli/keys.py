"""``sounding keys create|list|revoke``: the service's API keys."""

from __future__ import annotations

import json

import click

from sounding.indexer.errors import SettingsError

from ._common import example, index_option, settings


def keys_file_options(f):
    """``--index DIR`` (whose keys.db) and ``--keys FILE`` (a keys file elsewhere)."""
    f = click.option(
        "--keys",
        "keys_path",
        metavar="FILE",
        help="keys file (default: $SOUNDING_KEYS_PATH or DIR/keys.db)",
    )(f)
    return index_option(
        "index folder whose keys.db to use (default: $SOUNDING_INDEX_DIR or ./sounding-index)"
    )(f)


@click.group(
    "keys",
    short_help="create, list and revoke API keys",
    help="API keys for the service: each has a scope (read < write < admin), the "
    "groups whose restricted documents it may read, and optionally the act-for right "
    "(send an end user's groups in X-Sounding-On-Behalf-Of, among the groups it was "
    "given to act for). Only a salted scrypt hash of each key is stored.",
    epilog=example(
        "examples:\n  sounding keys create --name wiki-search --scope read --groups hr\n"
        "  sounding keys list\n  sounding keys revoke wiki-search"
    ),
    no_args_is_help=False,
    subcommand_metavar="ACTION [ARGS]...",
)
def keys_group() -> None:
    pass


@keys_group.command(
    "create",
    short_help="make a key and print its secret once",
    help="Make a key and print its secret on stdout, once: only its hash is kept.",
    epilog=example(
        "examples:\n  sounding keys create --name ana --scope read --groups hr,finance\n"
        "  sounding keys create --name chat-bot --scope read --act-for \\\n"
        "      --act-for-groups hr,finance,ops > chat-bot.key"
    ),
)
@keys_file_options
@click.option("--name", required=True, help="unique name: letters, digits, '.', '_', '-'")
@click.option(
    "--scope",
    required=True,
    metavar="read|write|admin",
    help="read: search and read; write: also push and delete documents; admin: everything",
)
@click.option(
    "--groups",
    metavar="G1,G2",
    default="",
    help="groups whose restricted documents the key may read (default: none)",
)
@click.option(
    "--act-for",
    is_flag=True,
    help="the key may send an end user's groups in X-Sounding-On-Behalf-Of",
)
@click.option(
    "--act-for-groups",
    metavar="G1,G2",
    default="",
    help="with --act-for: the only groups the key may claim for an end user "
    "(default: none, so it may act only for users in no group)",
)
def create_command(
    index_dir: str | None,
    keys_path: str | None,
    name: str,
    scope: str,
    groups: str,
    act_for: bool,
    act_for_groups: str,
) -> int:
    from sounding.service.keys import KeyStore

    if act_for_groups.strip() and not act_for:
        raise SettingsError("--act-for-groups needs --act-for")
    config = settings(index_dir=index_dir, keys_path=keys_path)
    with KeyStore(config.keys_file) as store:
        record, secret = store.create(name, scope, groups, act_for, act_for_groups)
    click.echo(secret)
    named = ",".join(sorted(record.groups)) or "none"
    acting = ""
    if record.act_for:
        acting = f", act-for groups {','.join(sorted(record.act_for_groups)) or 'none'}"
    click.echo(
        f"sounding: created key {record.name!r} (id {record.id}, scope {record.scope}, "
        f"groups {named}{acting}); store the secret above safely now: it is not shown again",
        err=True,
    )
    return 0


@keys_group.command(
    "list",
    short_help="show every key (never secrets)",
    help="Show every key, live and revoked: id, name, scope, groups, act-for groups.",
    epilog=example("example:\n  sounding keys list --json"),
)
@keys_file_options
@click.option("--json", "as_json", is_flag=True, help="print a JSON list")
def list_command(index_dir: str | None, keys_path: str | None, as_json: bool) -> int:
    from sounding.service.keys import KeyStore

    config = settings(index_dir=index_dir, keys_path=keys_path)
    if not config.keys_file.is_file():
        raise SettingsError(
            f"no keys file at {config.keys_file}; create a key with "
            "`sounding keys create --name NAME --scope read`"
        )
    with KeyStore(config.keys_file) as store:
        records = store.list()
    if as_json:
        click.echo(json.dumps([r.to_json() for r in records], indent=2))
        return 0
    if not records:
        click.echo("no keys")
    for r in records:
        j = r.to_json()
        state = f"revoked {j['revoked_at']}" if r.revoked else "live"
        acting = f"  act-for={','.join(j['act_for_groups']) or '-'}" if r.act_for else ""
        click.echo(
            f"{r.id}  {r.name:<20} {r.scope:<5}  groups={','.join(j['groups']) or '-'}"
            f"{acting}  created {j['created_at']}  {state}"
        )
    return 0


@keys_group.command(
    "revoke",
    short_help="revoke a key by name or id; a running service refuses it at once",
    help="Revoke the live key of that name, or the key of that id.",
    epilog=example("example:\n  sounding keys revoke chat-bot"),
)
@click.argument("key", metavar="NAME")
@keys_file_options
def revoke_command(key: str, index_dir: str | None, keys_path: str | None) -> int:
    from sounding.service.keys import KeyStore

    config = settings(index_dir=index_dir, keys_path=keys_path)
    if not config.keys_file.is_file():
        raise SettingsError(f"no keys file at {config.keys_file}; nothing to revoke")
    with KeyStore(config.keys_file) as store:
        before = {r.id: r.revoked for r in store.list()}
        record = store.revoke(key)
    if before.get(record.id):
        click.echo(f"key {record.name!r} ({record.id}) was revoked already")
    else:
        click.echo(
            f"revoked key {record.name!r} ({record.id}); a running service refuses it "
            "from its next request"
        )
    return 0


COMMANDS = (keys_group,)
