"""``leastwise token ...`` and ``leastwise audit``: access tokens and the audit trail, straight on the database.

These work on the database itself (not over HTTP), so the first token can be
made before the service listens beyond loopback:

    leastwise token create --database URL --scope admin --label operator
    leastwise token list --database URL
    leastwise token revoke --database URL 3
    leastwise audit --database URL --model plant-a-1 --since 2024-05-01T00:00:00Z

``token create`` prints the token, and only the token, on stdout (once: only
its SHA-256 digest is stored); everything else goes to stderr. Token changes
made here are recorded in the audit trail with the detail ``command line``.
"""

from __future__ import annotations

import getpass
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

import click

__all__ = ["register"]

_DB_HELP = "Database URL. [env LEASTWISE_DATABASE; sqlite:///leastwise.sqlite3]"


@contextmanager
def _access(database: str | None) -> Iterator[Any]:
    from leastwise.models.access import AccessControl
    from leastwise.settings import Settings
    from leastwise.store import Store

    settings = Settings.from_env(database=database)
    store = Store.open(settings.database, pool_size=1)
    try:
        yield AccessControl(store)
    finally:
        store.close()


def _who() -> str:
    try:
        return f"command line ({getpass.getuser()})"
    except Exception:  # noqa: BLE001 - no user name in some containers
        return "command line"


def _fail(exc: Exception) -> click.ClickException:
    detail = getattr(exc, "detail", None) or str(exc)
    return click.ClickException(detail)


@click.group("token")
def token_group() -> None:
    """Create, list and revoke access tokens (scopes: read, write, admin)."""


@token_group.command("create")
@click.option("--database", default=None, help=_DB_HELP)
@click.option("--scope", required=True, type=click.Choice(["read", "write", "admin"]),
              help="read: state, predict, drift, lists; write: read + observations; admin: everything.")
@click.option("--label", default=None, help="A name for the token, shown in the audit trail.")
@click.option("--models", "pattern", default=None,
              help="Limit to model names matching this glob (* ? [...] [!...], case-sensitive), e.g. 'plant-a-*'.")
def token_create(database: str | None, scope: str, label: str | None, pattern: str | None) -> None:
    """Make a token and print it once on stdout (only its hash is stored)."""
    from leastwise.models import RegistryError

    with _access(database) as access:
        try:
            record, token = access.create_token(scope, label, pattern)
        except RegistryError as exc:
            raise _fail(exc) from None
        access.record(action="token-create", token_label=None, outcome="ok", status=201,
                      detail=f"{_who()}: token {record.id} {record.label!r} scope {record.scope} models {record.models!r}")
    click.echo(f"token {record.id} ({record.label}, scope {record.scope}, models {record.models or '*'}); "
               "it is shown only now:", err=True)
    click.echo(token)


@token_group.command("list")
@click.option("--database", default=None, help=_DB_HELP)
@click.option("--all/--active", "show_all", default=False, show_default=True, help="Include revoked tokens.")
def token_list(database: str | None, show_all: bool) -> None:
    """List tokens (never the tokens themselves)."""
    with _access(database) as access:
        records = access.list_tokens(include_revoked=show_all)
    if not records:
        click.echo("no tokens" if show_all else "no active tokens", err=True)
        return
    click.echo(f"{'id':>4}  {'scope':<6} {'models':<20} {'created':<27} {'revoked':<27} label")
    for r in records:
        v = r.view()
        click.echo(f"{r.id:>4}  {r.scope:<6} {(r.models or '*'):<20} {v['created'] or '':<27} {v['revoked'] or '-':<27} "
                   f"{r.label}")


@token_group.command("revoke")
@click.option("--database", default=None, help=_DB_HELP)
@click.argument("token_id", type=int)
def token_revoke(database: str | None, token_id: int) -> None:
    """Revoke the token with this id (see ``token list``); it stops working within a second."""
    from leastwise.models import RegistryError

    with _access(database) as access:
        try:
            record, changed = access.revoke_token(token_id)
        except RegistryError as exc:
            raise _fail(exc) from None
        access.record(action="token-revoke", token_label=None, outcome="ok", status=204,
                      detail=f"{_who()}: token {record.id} {record.label!r}" + ("" if changed else " (already revoked)"))
    click.echo(f"token {record.id} ({record.label}) " + ("revoked" if changed else "was already revoked"))


@click.command("audit")
@click.option("--database", default=None, help=_DB_HELP)
@click.option("--model", default=None, help="Only entries for this model.")
@click.option("--action", default=None,
              help="Only this action: create, config, delete, reset, snapshot, snapshot-delete, restore, "
                   "token-create, token-revoke (or a refused route's action, e.g. observe).")
@click.option("--outcome", type=click.Choice(["ok", "failed", "denied"]), default=None, help="Only this outcome.")
@click.option("--since", default=None, help="RFC 3339 time or epoch seconds (inclusive).")
@click.option("--limit", type=click.IntRange(1, 100000), default=50, show_default=True, help="Newest entries shown.")
@click.option("--json", "as_json", is_flag=True, help="One JSON object per line.")
def audit_command(database: str | None, model: str | None, action: str | None, outcome: str | None,
                  since: str | None, limit: int, as_json: bool) -> None:
    """Show the audit trail, newest first: operator actions and refused attempts."""
    import orjson

    from leastwise.models import RegistryError
    from leastwise.models.inputs import parse_time

    t0 = None
    if since is not None:
        try:
            try:
                t0 = parse_time(float(since), "--since")
            except ValueError:
                t0 = parse_time(since, "--since")
        except RegistryError as exc:
            raise click.BadParameter(exc.detail, param_hint="--since") from None
    with _access(database) as access:
        entries = access.audit(model=model, action=action, outcome=outcome, since=t0, limit=limit)
    for e in entries:
        if as_json:
            click.echo(orjson.dumps(e).decode())
            continue
        versions = f"{_v(e['version_before'])}->{_v(e['version_after'])}"
        click.echo(f"{e['at']}  {e['outcome']:<6} {e['status']:>3}  {e['action']:<15} {e['model'] or '-':<24} "
                   f"{versions:<11} {e['token_label'] or '-'}" + (f"  {e['detail']}" if e["detail"] else ""))


def _v(version: int | None) -> str:
    return "-" if version is None else str(version)


def register(main: click.Group) -> None:
    """Add ``token`` and ``audit`` to the ``leastwise`` command group."""
    main.add_command(token_group)
    main.add_command(audit_command)
