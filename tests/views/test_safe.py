"""Strings from drives made harmless: control and format characters shown, markup escaped."""

from __future__ import annotations

import unicodedata

from triage.report.safe import for_html, for_terminal, printable


def test_controls_and_bidi_overrides_become_visible_escapes():
    # Unicode Standard 4.5: ESC (U+001B) is Cc, RIGHT-TO-LEFT OVERRIDE (U+202E) is Cf
    assert unicodedata.category("\x1b") == "Cc" and unicodedata.category("\u202e") == "Cf"
    assert printable("a\x1b[31mb\u202ec\n") == "a\\x1b[31mb\\u202ec\\x0a"
    assert printable("a\nb", keep="\n") == "a\nb"
    assert printable("Tallow 14T") == "Tallow 14T"
    assert printable(None) == "" and printable(float("nan")) == ""


def test_terminal_text_escapes_rich_markup():
    assert for_terminal("QH-[b]8T") == "QH-\\[b]8T"


def test_html_text_escapes_markup_and_quotes():
    assert for_html('<img src=x onerror="y">\x07') == "&lt;img src=x onerror=&quot;y&quot;&gt;\\x07"
