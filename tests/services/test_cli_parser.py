"""The ``krt`` parser: the command table in tracker.cli and the command modules agree,
and ``krt --help`` imports no command implementation (issue: a quick CLI)."""

from __future__ import annotations

import subprocess
import sys

import pytest

from tracker import cli


def _choices(parser) -> dict:
    action = next(a for a in parser._actions if a.dest == "command")
    return action.choices


def test_every_command_module_registers_exactly_the_commands_the_table_names():
    registered = _choices(cli.build_parser([], full=True))
    assert set(registered) == set(cli.COMMANDS)
    for name, (module, help_text) in cli.COMMANDS.items():
        real = cli.build_parser([name])
        assert _choices(real)[name].prog == f"krt {name}"
        # the help line shown by `krt --help` is the one the module gives its parser
        action = next(a for a in real._actions if a.dest == "command")
        helps = {c.dest: c.help for c in action._choices_actions}
        assert helps[name] == help_text, name


@pytest.mark.parametrize("argv", [["--help"], ["--database", "sqlite:///x.sqlite", "--help"]])
def test_top_level_help_imports_no_command_module_nor_pandas(argv):
    code = (
        "import sys; from tracker.cli import build_parser; build_parser(%r);"
        "print(sorted(m for m in sys.modules if m.startswith('tracker.commands.') or m in ('pandas', 'sqlalchemy', 'numpy')))"
    ) % (argv,)
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout.strip()
    assert out == "[]"


def test_a_command_imports_only_its_own_module():
    code = ("import sys; from tracker.cli import build_parser; build_parser(['--database', 'x', 'info']);"
            "print(sorted(m for m in sys.modules if m.startswith('tracker.commands.')))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout.strip()
    assert out == "['tracker.commands.info']"
