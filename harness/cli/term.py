"""The terminal of every sub-command: a rich console that prints strings as written.

Serial numbers, board and part names, file paths, operator names and instrument replies
come from users and instruments; with console markup on, ``[/]`` in any of them ends in a
``MarkupError`` (a crash mid-run) and ``[red]`` in a board name restyles the screen.  So
markup is off on every console made here, and styles are given with ``Text`` objects,
never by formatting text into markup.
"""

from __future__ import annotations

from typing import Any


def make_console(**kw: Any) -> Any:
    """A ``rich.console.Console`` with markup off (and ``highlight`` off unless asked)."""
    from rich.console import Console

    kw.setdefault("highlight", False)
    return Console(markup=False, **kw)


def styled(text: str, style: str = "") -> Any:
    """``text`` as a ``rich.text.Text`` in ``style``: safe for titles and table cells
    whatever characters it holds."""
    from rich.text import Text

    return Text(str(text), style=style)
