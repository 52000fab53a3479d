"""``demaudit token new``: a bearer token and the DEMAUDIT_PRINCIPALS entry (its hash)."""

from __future__ import annotations

import argparse
import sys
from typing import Any

from demaudit.service.cli.exits import EXIT_BAD_INPUT, EXIT_CLEAN
from demaudit.service.settings import Settings

__all__ = ["add_token_parser"]


def add_token_parser(sub: Any) -> None:
    """``demaudit token new [--name N] [--admin]``."""
    token = sub.add_parser("token", help="make bearer tokens for the REST service")
    actions = token.add_subparsers(required=True, metavar="ACTION")
    new = actions.add_parser(
        "new", help="print a new token and the DEMAUDIT_PRINCIPALS entry (its hash) to configure"
    )
    new.add_argument("--name", default="user", help="principal name (default 'user')")
    new.add_argument("--admin", action="store_true", help="the admin role (sees all jobs)")
    new.set_defaults(handler=new_token_command)


def new_token_command(args: argparse.Namespace, settings: Settings) -> int:
    """Print a new token (once) and the entry the server needs."""
    from demaudit.service.api.auth import ADMIN, USER, TokenPolicyError, hash_token, new_token
    from demaudit.service.api.auth import parse_principal_line as check_line

    token = new_token()
    line = f"{args.name}:{ADMIN if args.admin else USER}:{hash_token(token)}"
    try:
        check_line(line, where="--name")
    except TokenPolicyError as exc:
        print(f"demaudit: error: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    print(f"token: {token}")
    print(f"DEMAUDIT_PRINCIPALS entry: {line}")
    print(
        "give the token to its holder (shown only now; e.g. DEMAUDIT_TOKEN for the CLI); the "
        "server needs only the entry",
        file=sys.stderr,
    )
    return EXIT_CLEAN
