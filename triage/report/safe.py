"""Strings from drives and hosts made harmless for a terminal, a rich table or an HTML page.

The views' names for the one sanitiser, ``triage.safety`` (see its docstring): every character of
Unicode category Cc (controls) or Cf (format, which holds the bidi overrides and zero-width
characters; Unicode Standard, 4.5 "General Category") becomes a visible escape. Nothing is cut
here: the views lay out long values themselves.
"""

from __future__ import annotations

from rich.markup import escape as _rich_escape

from triage.safety import html_text, visible


def printable(value, keep: str = "") -> str:
    """``value`` as text with control and format characters shown as escapes; None/NaN -> ''.

    Characters in ``keep`` pass through (a format with its own escape for them, e.g. line feed).
    """
    return visible(value, None, keep)


def for_terminal(value) -> str:
    """Printable and with rich markup escaped: safe inside a rich table or ``console.print``."""
    return _rich_escape(visible(value, None))


def for_html(value) -> str:
    """Printable and HTML-escaped (``&<>"'``): safe as element text and inside quoted attributes."""
    return html_text(value, None)
