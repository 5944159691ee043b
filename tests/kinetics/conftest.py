"""A shared in-process runner for the ``krt`` command-line tests of this folder."""

from __future__ import annotations

import json

import pytest

from tracker.cli import main


class _Runner:
    def __init__(self, capsys):
        self._capsys = capsys

    def run(self, argv):
        """``(exit code, stdout, stderr)``; argparse-level errors exit directly and count as codes."""
        try:
            rc = main(argv)
        except SystemExit as exc:
            rc = exc.code
        out, err = self._capsys.readouterr()
        return rc, out, err

    def fails(self, argv, fragment):
        """The command must fail with exactly one ``krt: error:`` line naming ``fragment``, and no traceback."""
        rc, out, err = self.run(argv)
        assert rc != 0
        lines = err.strip().splitlines()
        assert len(lines) == 1, err
        assert lines[0].startswith("krt: error:")
        assert fragment in lines[0]
        assert "Traceback" not in err and out == ""

    def json(self, argv):
        """Run with ``--json``; the command must succeed silently on stderr."""
        rc, out, err = self.run(argv + ["--json"])
        assert rc == 0, err
        assert err == ""
        return json.loads(out)


@pytest.fixture
def krt_cli(capsys):
    return _Runner(capsys)
