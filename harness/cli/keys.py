"""``harness keys [SECTION]``: every scenario key with its default, allowed values and meaning.

The table is printed from the same declarations the scenario is resolved with
(harness.core.scenario.key_table), so it never drifts from what ``harness run`` accepts.
"""

from __future__ import annotations

import argparse
import json
import sys
import textwrap

from harness.core.errors import InputError
from harness.core.scenario import JUDGING_SECTIONS, key_table


def format_keys(section: str | None = None, width: int = 100) -> str:
    """The key table as text, one block per section (``section`` alone when given)."""
    rows = key_table()
    sections = list(dict.fromkeys(row[0] for row in rows))
    if section is not None and section not in sections:
        raise InputError(f"harness keys: section '{section}' is unknown; sections: {', '.join(sections)}")
    lines: list[str] = []
    for name in sections if section is None else [section]:
        note = " (how runs are judged: not part of the run_id)" if name in JUDGING_SECTIONS else ""
        lines.append(f"[{name}]{note}")
        for _, key, kind, default, allowed, meaning in (row for row in rows if row[0] == name):
            shown = "(derived)" if default is None else json.dumps(default)
            lines.append(f"  {key} = {shown}    {kind}")
            for text in (meaning, f"allowed: {allowed}"):
                lines += textwrap.wrap(text, width, initial_indent="      ", subsequent_indent="      ")
        lines.append("")
    return "\n".join(lines)


def _cmd_keys(args: argparse.Namespace) -> int:
    sys.stdout.write(format_keys(args.section))
    return 0


def add_keys_command(subparsers: argparse._SubParsersAction) -> None:
    """Register ``harness keys``."""
    keys = subparsers.add_parser(
        "keys", help="list every scenario key with its default, allowed values and meaning",
        description="Every scenario key, section by section, with its default, what it allows and what it means.",
    )
    keys.add_argument("section", nargs="?", help="one section only (data, teacher, student, sgd, run, theory, ...)")
    keys.set_defaults(handler=_cmd_keys)
