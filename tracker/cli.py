"""``krt``: the command line.  A thin translator from arguments to services.

Each module in :mod:`tracker.commands` exposes ``register(subparsers)`` and
sets ``func`` on its parsers; a handler takes the parsed ``args`` and returns
an exit code.  Every :class:`~tracker.errors.KrtError` becomes one line on
stderr and a non-zero exit, never a traceback.
"""

from __future__ import annotations

import argparse
import importlib
import sys

from .errors import ImportErrors, KrtError

COMMAND_MODULES = ("db", "info", "io", "demo", "fit", "simulate", "grade", "queue", "users", "gate", "audit", "backup", "bench")


class _Parser(argparse.ArgumentParser):
    def error(self, message: str):  # one line, exit 2, like every other input error
        self.exit(2, f"krt: error: {message}\n")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="krt", description="Kinetic-risk tracker for drug-discovery portfolios.")
    parser.add_argument("--database", metavar="URL", help="SQLAlchemy URL (default: $KRT_DATABASE_URL or a local SQLite file)")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for name in COMMAND_MODULES:
        try:
            module = importlib.import_module(f"tracker.commands.{name}")
        except ModuleNotFoundError as exc:
            if exc.name == f"tracker.commands.{name}":
                continue  # command not built yet
            raise
        module.register(sub)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.database:
        import os

        os.environ["KRT_DATABASE_URL"] = args.database
    if not getattr(args, "func", None):
        parser.print_help()
        return 2
    try:
        return int(args.func(args) or 0)
    except ImportErrors as exc:
        for err in exc.errors:
            print(f"krt: error: {err.one_line()}", file=sys.stderr)
        print(f"krt: nothing was written ({len(exc.errors)} error(s))", file=sys.stderr)
        return 2
    except KrtError as exc:
        print(f"krt: error: {exc.one_line()}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("krt: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
