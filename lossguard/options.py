"""Run settings shared by the command line and the pytest plugin, declared once.

Each :class:`Setting` knows its command-line flag, its pytest flag and ini key, its type, its
default and its help text; ``cli`` and ``pytest_plugin`` both register from this table.
"""

from __future__ import annotations

import argparse
from dataclasses import dataclass
from typing import Any

from .effort import EFFORTS

__all__ = ["EFFORTS", "Setting", "SETTINGS", "add_to_argparse"]



@dataclass(frozen=True)
class Setting:
    name: str
    type: type
    default: Any
    help: str
    choices: tuple[str, ...] | None = None

    @property
    def flag(self) -> str:
        """Command-line flag (``--seed``)."""
        return f"--{self.name}"

    @property
    def pytest_flag(self) -> str:
        """pytest flag (``--lossguard-seed``): namespaced so it cannot clash with other plugins."""
        return f"--lossguard-{self.name}"

    @property
    def ini(self) -> str:
        """pytest ini key (``lossguard_seed``)."""
        return f"lossguard_{self.key}"

    @property
    def key(self) -> str:
        """The Python name (``call_timeout``): keyword of :func:`lossguard.run`, argparse dest."""
        return self.name.replace("-", "_")

    def parse(self, text: Any) -> Any:
        value = self.type(text)
        if self.choices and value not in self.choices:
            raise ValueError(f"{self.name}={value!r}: expected one of {', '.join(self.choices)}")
        return value


SETTINGS: tuple[Setting, ...] = (
    Setting("seed", int, 0, "seed for every random choice; the same seed gives the same report"),
    Setting("effort", str, "default", "how hard to look: quick (pre-commit), default (CI), thorough (release)",
            EFFORTS),
    Setting("call-timeout", float, 60.0, "seconds one call of the loss may take before its check reports an error "
            "(a JAX loss: its tracing, not XLA's compilation)"),
    Setting("time-budget", float, 300.0, "seconds the whole battery may take; checks left then are reported as not run"),
    Setting("memory-budget", float, None, "GiB the largest check may need (estimated from the shapes before "
            "running); default half the machine's memory"),
)


def add_to_argparse(parser: argparse.ArgumentParser) -> None:
    """Register the shared settings on an argparse parser."""
    for s in SETTINGS:
        parser.add_argument(s.flag, type=s.type, default=s.default, choices=s.choices, help=s.help)
