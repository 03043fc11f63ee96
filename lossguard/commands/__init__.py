"""Subcommands of the ``lossguard`` command: one module each, with ``add_parser`` and ``main``.

Adding a command is adding a module and its name to :data:`COMMANDS`.
"""

from __future__ import annotations

COMMANDS = ("check", "profile", "compare", "references", "checks")
