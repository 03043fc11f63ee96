"""``lossguard references``: list the registry with parameters and citations."""

from __future__ import annotations

import argparse
import sys

HELP = "list the reference losses with their parameters and citations"


def add_parser(sub: argparse._SubParsersAction) -> argparse.ArgumentParser:
    return sub.add_parser("references", help=HELP, description=HELP)


def main(args: argparse.Namespace) -> int:
    from ..references import REFERENCES

    lines = []
    for ref in REFERENCES.values():
        lines.append(f"{ref.name}  —  {ref.summary}")
        lines.append(f"    kinds: {', '.join(sorted(ref.kinds))};  inputs: {', '.join(sorted(ref.inputs))};"
                     f"  targets: {ref.target_domain}")
        lines.append(f"    formula: {ref.formula}")
        for p in ref.params:
            lines.append(f"    param {p.name} (default {p.default!r}): {p.doc}")
        lines.append(f"    properties: {', '.join(sorted(ref.properties)) or 'none'}")
        lines.append(f"    source: {ref.citation}")
        lines.append("")
    sys.stdout.write("\n".join(lines))
    return 0
