"""The slot / group map file: our own CSV (RFC 4180 quoting), keyed by serial or wwn:<16 hex>."""

from __future__ import annotations

import pytest

from triage.capture.groupmap import GroupMapError, Placement, load_group_map, parse_group_map

GOOD = """\
# Quillmere Hosting, site ash, rack 3
key,slot,group
QHA7K2M001,ash-r03-u12-bay04,ash-pool-a

wwn:5000CCA0AA11BB22,ash-r03-u12-bay05,ash-pool-a
CNV1920A0042,ash-r03-u14-nvme0,
"QH,ODD 7",ash-r03-u12-bay06,ash-pool-b
"""


def test_serial_lines_place_the_drive():
    placement = parse_group_map(GOOD).lookup("QHA7K2M001", None)
    assert placement == Placement("ash-r03-u12-bay04", "ash-pool-a")


def test_wwn_keys_match_case_insensitively():
    assert parse_group_map(GOOD).lookup("TLW14X0093", "5000cca0aa11bb22").slot == "ash-r03-u12-bay05"


def test_empty_group_is_null():
    assert parse_group_map(GOOD).lookup("CNV1920A0042", None) == Placement("ash-r03-u14-nvme0", None)


def test_quoted_serial_with_a_comma_is_one_field():
    # RFC 4180 §2 rule 6: fields containing commas are enclosed in double quotes
    assert parse_group_map(GOOD).lookup("QH,ODD 7", None).group == "ash-pool-b"


def test_unknown_drive_gets_null_slot_and_group():
    assert parse_group_map(GOOD).lookup("NOT-THERE", "5000c50000000001") == Placement(None, None)


def test_wwn_line_wins_over_a_serial_line_for_the_same_drive():
    text = "QHA7K2M001,bay-by-serial,g1\nwwn:5000c50012ab34cd,bay-by-wwn,g2\n"
    assert parse_group_map(text).lookup("QHA7K2M001", "5000c50012ab34cd").slot == "bay-by-wwn"


def test_header_and_comments_are_optional():
    assert len(parse_group_map("QHA7K2M001,bay1,g1\n")) == 1


@pytest.mark.parametrize(
    "text, message",
    [
        ("QHA7K2M001,bay1\n", "map.csv:1: expected 3 fields key,slot,group, found 2"),
        ("key,slot,group\n,bay1,g1\n", "map.csv:2: field 'key' is empty"),
        ("# c\nwwn:5000c500,bay1,g1\n", "map.csv:2: field 'key': 'wwn:5000c500' is not wwn: followed by 16 hex digits"),
        ("A1,b1,g1\nB2,b2,g2\nA1,b3,g3\n", "map.csv:3: field 'key': 'A1' already mapped on line 1"),
        ("wwn:5000c50012ab34cd,b1,g\nwwn:5000C50012AB34CD,b2,g\n", "map.csv:2: field 'key': 'wwn:5000C50012AB34CD' already mapped on line 1"),
        ('A1,"b1,g1\n', "map.csv:1: unexpected end of data"),
    ],
)
def test_a_bad_line_is_named_by_file_line_and_field(text, message):
    with pytest.raises(GroupMapError) as caught:
        parse_group_map(text, "map.csv")
    assert str(caught.value) == message


def test_loading_a_missing_file_is_one_clear_error(tmp_path):
    with pytest.raises(GroupMapError, match="cannot read the group map"):
        load_group_map(tmp_path / "absent.csv")


def test_loading_a_non_utf8_file_is_one_clear_error(tmp_path):
    path = tmp_path / "map.csv"
    path.write_bytes(b"QH\xffA,bay1,g1\n")
    with pytest.raises(GroupMapError, match="not UTF-8"):
        load_group_map(path)
