"""Where the commands' rich tables go: fitted to a terminal, whole in a pipe or a log.

In a terminal rich fits a table to the window, wrapping long cells. Printed to a pipe, a file or
a service's log there is no window: rich would assume 80 columns (or $COLUMNS) and cut headers
and cells short ("coverag…"), so there a table is printed at its own full width instead.
"""

from __future__ import annotations

from rich.console import Console

UNCUT_WIDTH = 10_000  # wider than any table here; rich prints a table no wider than it needs


def table_console() -> Console:
    """A console on stdout for tables: the terminal's width on one, else room for every column."""
    console = Console()
    return console if console.is_terminal else Console(width=UNCUT_WIDTH)
