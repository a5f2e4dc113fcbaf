"""``burstlens tokens add NAME``: create a bearer token (printed once, stored hashed)."""
from __future__ import annotations

import argparse
import sys

from burstlens.service.auth import create_token
from burstlens.service.commands.options import service_settings_from
from burstlens.service.store import Conflict, DataDirTooNew, Store


def register(p) -> None:
    p.description = "Create, revoke and list bearer tokens of the API."
    p.add_argument("--data-dir", metavar="DIR",
                   help="store folder (default $BURSTLENS_DATA_DIR, else ./burstlens-data)")
    # --data-dir is accepted after the action too (`tokens add NAME --data-dir D`)
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("--data-dir", default=argparse.SUPPRESS, help=argparse.SUPPRESS)
    sub = p.add_subparsers(dest="action", metavar="ACTION", required=True)
    add = sub.add_parser("add", parents=[common], help="create a token and print it once")
    add.add_argument("name", help="token name (unique)")
    add.add_argument("--tenant", help="tenant the token acts for (default: the name)")
    revoke = sub.add_parser("revoke", parents=[common], help="revoke a token by name")
    revoke.add_argument("name", help="name of the token to revoke; requests with it are "
                                     "refused from then on")
    sub.add_parser("list", parents=[common], help="list token names and tenants (never the tokens)")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    try:
        store = Store(service_settings_from(args, "data_dir").data_dir)
    except DataDirTooNew as exc:
        print(f"burstlens tokens: {exc}", file=sys.stderr)
        return 2
    if args.action == "add":
        try:
            token = create_token(store, args.name, args.tenant)
        except (Conflict, ValueError) as exc:
            print(f"burstlens tokens: {exc}", file=sys.stderr)
            return 2
        print(token)
        print(f"token {args.name!r} for tenant {(args.tenant or args.name)!r}: shown only now; "
              "the store keeps its sha256", file=sys.stderr)
        return 0
    if args.action == "revoke":
        if not store.revoke_token(args.name):
            print(f"burstlens tokens: no active token named {args.name!r}", file=sys.stderr)
            return 2
        return 0
    for row in store.list_tokens():
        state = "revoked" if row["revoked_at"] else "active"
        print(f"{row['name']}\t{row['tenant']}\t{state}")
    return 0
