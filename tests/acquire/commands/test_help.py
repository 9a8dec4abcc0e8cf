"""Every command's --help prints and exits 0 (argparse formats each option's help text: a stray % fails)."""
from __future__ import annotations

import contextlib
import io

import pytest

from acquire.commands.cli import build_parser
from display.cli import main

COMMANDS = sorted(build_parser()._subparsers._group_actions[0].choices)


def test_the_command_list_is_what_the_readme_names():
    # the README's command table names these; a new command needs a line there too
    assert set(COMMANDS) >= {"live", "record", "calibrate", "tare", "process", "replay", "health", "inspect",
                             "export", "virtual-device", "ports"}


@pytest.mark.parametrize("command", COMMANDS)
def test_help_of_every_command(command):
    out = io.StringIO()
    with contextlib.redirect_stdout(out), pytest.raises(SystemExit) as exc:
        main([command, "--help"])
    assert exc.value.code == 0
    assert f"usage: tapcurve {command}" in out.getvalue()
