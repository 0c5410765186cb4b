"""Strings from drives and hosts made harmless for a terminal, a rich table or an HTML page.

Model, firmware, host, slot and group names reach us from firmware and from capture files that
other people's scripts write: a control byte (ESC starts a terminal command), a bidirectional
override (U+202E reverses what follows on screen) or markup must show as text, never act.
``printable`` turns every character of Unicode category Cc (controls) or Cf (format, which holds
the bidi overrides and zero-width characters; Unicode Standard, 4.5 "General Category") into a
visible escape: ``\\xNN`` below 0x100, ``\\uNNNN`` above, as ``triage.formats.text`` does for bytes.
"""

from __future__ import annotations

import html
import math
import unicodedata

from rich.markup import escape as _rich_escape


def _escaped(char: str) -> str:
    if unicodedata.category(char) in ("Cc", "Cf", "Cs"):
        code = ord(char)
        return f"\\x{code:02x}" if code < 0x100 else f"\\u{code:04x}"
    return char


def printable(value, keep: str = "") -> str:
    """``value`` as text with control and format characters shown as escapes; None/NaN -> ''.

    Characters in ``keep`` pass through (a format with its own escape for them, e.g. line feed).
    """
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return ""
    text = str(value)
    if text.isprintable():
        return text
    return "".join(c if c in keep else _escaped(c) for c in text)


def for_terminal(value) -> str:
    """Printable and with rich markup escaped: safe inside a rich table or ``console.print``."""
    return _rich_escape(printable(value))


def for_html(value) -> str:
    """Printable and HTML-escaped (``&<>"'``): safe as element text and inside quoted attributes."""
    return html.escape(printable(value), quote=True)
