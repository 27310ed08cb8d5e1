"""``python -m polkit.cli``: the ``polkit`` command."""

from polkit.cli import run

run()
