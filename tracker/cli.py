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

# Every top-level command: name -> (module in tracker.commands, one-line help).
# ``krt --help`` is built from this table alone; only the module of the command
# being run is imported (``tests/services/test_cli_parser.py`` keeps the table
# and the modules in step).
COMMANDS: dict[str, tuple[str, str]] = {
    "db": ("db", "create or migrate the database schema"),
    "info": ("info", "database location, schema revision and row counts"),
    "import": ("io", "import a CSV file, an .xlsx workbook or a folder of them (all or nothing)"),
    "export": ("io", "write every table as CSV (and optionally one .xlsx) in the import format"),
    "demo": ("demo", "the invented demo portfolio"),
    "fit": ("fit", "fit a kinetic time course or dose-response set (koff, kon, residence time, Ki shift ...)"),
    "simulate": ("simulate", "simulate apparent affinity, engagement under PK, RT bounds"),
    "grade": ("grade", "grade every compound's kinetic risk (findings with numbers, prompts and cautions)"),
    "rules": ("grade", "show or change the rule settings (thresholds) of a program"),
    "queue": ("queue", "rank compounds by the value of a kinetic measurement, with the assay to use"),
    "user": ("users", "add, list or change users (lead, scientist, viewer)"),
    "login": ("signin", "sign in to this database (a short-lived session in your private config folder)"),
    "logout": ("signin", "end your session on this database"),
    "gate": ("gate", "move a compound to another stage, gated on its grade (leads only; recorded)"),
    "action": ("action", "open, list and close actions on findings (owner, due date, status)"),
    "changes": ("changes", "what changed since a date or a review pack (grades, findings, data, gates, actions)"),
    "audit": ("audit", "verify or show the tamper-evident audit trail"),
    "backup": ("backup", "back up the database (SQLite online copy, or an export-based backup with --export)"),
    "restore": ("backup", "restore a backup into a new database and verify its audit trail"),
    "bench": ("bench", "run every benchmark and print one table (needs a source checkout)"),
}
COMMAND_MODULES = tuple(dict.fromkeys(module for module, _ in COMMANDS.values()))


class _Parser(argparse.ArgumentParser):
    def error(self, message: str):  # one line, exit 2, like every other input error
        self.exit(2, f"krt: error: {message}\n")


def _command_in(argv: list[str]) -> str | None:
    """The command word of ``argv`` (the first positional, skipping ``--database URL``)."""
    skip = False
    for token in argv:
        if skip:
            skip = False
        elif token == "--database":
            skip = True
        elif not token.startswith("-"):
            return token
    return None


def build_parser(argv: list[str] | None = None, *, full: bool = False) -> argparse.ArgumentParser:
    """The ``krt`` parser.

    Only the module of the command named in ``argv`` registers its real
    sub-parser; every other command gets a placeholder carrying its help line,
    so ``krt --help`` imports no command implementation.  ``full=True``
    registers every module (tests use it to check :data:`COMMANDS`).
    """
    parser = _Parser(prog="krt", description="Kinetic-risk tracker for drug-discovery portfolios.")
    parser.add_argument("--database", metavar="URL", help="SQLAlchemy URL (default: $KRT_DATABASE_URL or a local SQLite file)")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    wanted = COMMAND_MODULES if full else tuple(
        {COMMANDS[c][0]} if (c := _command_in(sys.argv[1:] if argv is None else argv)) in COMMANDS else ())
    for name in wanted:
        importlib.import_module(f"tracker.commands.{name}").register(sub)
    for name, (_, help_text) in COMMANDS.items():
        if name not in sub.choices:
            sub.add_parser(name, help=help_text, add_help=False)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser(argv)
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
    except Exception as exc:  # last resort: a database or file error no command caught is still one line
        message = _environment_error(exc)
        if message is None:
            raise
        print(f"krt: error: {message}", file=sys.stderr)
        return 2


def _environment_error(exc: Exception) -> str | None:
    """One line for a driver or operating-system error (read-only database, held lock, unwritable path); else None."""
    from sqlalchemy.exc import DBAPIError

    if isinstance(exc, DBAPIError):
        from .db.session import describe_db_error

        return " ".join(describe_db_error(exc).split())
    if isinstance(exc, OSError):
        where = f"{exc.filename}: " if exc.filename else ""
        return " ".join(f"{where}{exc.strerror or exc}".split())
    return None


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
