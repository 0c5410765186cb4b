"""Cleaning of firmware string fields (triage.formats.text).

The escaping rule is our own (house rule: firmware bytes never reach a terminal unescaped); the
pairwise swap is ACS-3 3.3.10 "ATA string convention" (section number from memory).
"""

import pytest

from triage.formats.text import clean_ascii, clean_ata_string, encode_ata_string


def test_padding_spaces_and_nuls_are_stripped_from_both_ends():
    assert clean_ascii(b"  \x00QH-HD8T-A \x00\x00  ") == "QH-HD8T-A"


def test_inner_spaces_are_kept():
    assert clean_ascii(b"Tallow 14T          ") == "Tallow 14T"


def test_control_and_high_bytes_become_visible_escapes():
    assert clean_ascii(b"F\x1b[2J\x7f\xff") == "F\\x1b[2J\\x7f\\xff"


def test_nul_inside_the_text_is_escaped_not_stripped():
    assert clean_ascii(b"AB\x00CD") == "AB\\x00CD"


def test_a_literal_backslash_is_doubled_so_escapes_stay_unambiguous():
    assert clean_ascii(b"A\\x1b") == "A\\\\x1b"


def test_all_padding_gives_the_empty_string():
    assert clean_ascii(b"\x00" * 8) == ""
    assert clean_ascii(b" " * 8) == ""


def test_ata_string_swaps_each_byte_pair_before_cleaning():
    # ACS-3 3.3.10: "ABCD" is stored as the words 'AB','CD', first character in the high byte,
    # so memory (little-endian) holds B A D C.
    assert clean_ata_string(b"BADC  ") == "ABCD"


def test_ata_string_of_odd_length_is_refused():
    with pytest.raises(ValueError):
        clean_ata_string(b"ABC")


def test_encoding_an_ata_string_pads_with_spaces_then_swaps():
    assert encode_ata_string("ABC", 6, "serial") == b"BA C  "


def test_encoding_refuses_text_longer_than_the_field():
    with pytest.raises(ValueError, match="serial"):
        encode_ata_string("A" * 21, 20, "serial")
