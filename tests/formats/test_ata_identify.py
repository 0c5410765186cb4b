"""ATA IDENTIFY DEVICE data, built by hand from ACS-3 7.12.7 "IDENTIFY DEVICE data" (word
table; section number from memory). Words are little-endian; byte offset = 2 * word."""

import struct

import numpy as np
import pandas as pd
import pytest

from triage.formats.ata_identify import (
    build_ata_identify,
    decode_identify_batch,
    parse_ata_identify,
)
from triage.formats.errors import LayoutError

INT64_MAX = 2**63 - 1


def put_word(sector: bytearray, word: int, value: int) -> None:
    struct.pack_into("<H", sector, 2 * word, value)


def put_ata_string(sector: bytearray, first_word: int, text: bytes, words: int) -> None:
    """ACS-3 3.3.10: two characters per word, first character in bits 15:8 (the high byte)."""
    padded = text.ljust(2 * words, b" ")
    for i in range(words):
        put_word(sector, first_word + i, (padded[2 * i] << 8) | padded[2 * i + 1])


def seal(sector: bytearray) -> bytearray:
    """Word 255: signature A5h in the low byte, checksum in the high byte (ACS-3, word 255)."""
    sector[510] = 0xA5
    sector[511] = (-sum(sector[:511])) % 256
    return sector


def hand_built(**words: int) -> bytearray:
    sector = bytearray(512)
    put_ata_string(sector, 10, b"QHA0001234", 10)  # serial, words 10-19
    put_ata_string(sector, 23, b"QF01", 4)  # firmware, words 23-26
    put_ata_string(sector, 27, b"QH-HD8T-A", 20)  # model, words 27-46
    for name, value in words.items():
        put_word(sector, int(name[1:]), value)
    return sector


def test_serial_is_read_from_words_10_to_19_with_high_byte_first():
    sector = hand_built()
    # "QHA0001234" stored high byte first: memory order has each pair swapped.
    assert bytes(sector[20:30]) == b"HQ0A002143"
    assert parse_ata_identify(bytes(sector)).serial == "QHA0001234"


def test_abcd_stored_as_badc_reads_back_as_abcd():
    sector = hand_built()
    sector[20:40] = b"BADC".ljust(20, b" ")  # ACS-3 3.3.10: "ABCD" lives in memory as B A D C
    assert parse_ata_identify(bytes(sector)).serial == "ABCD"


def test_firmware_is_words_23_to_26_and_model_words_27_to_46_trimmed():
    parsed = parse_ata_identify(bytes(hand_built()))
    assert parsed.firmware == "QF01"
    assert parsed.model == "QH-HD8T-A"  # odd length: last word holds "A " (A, then space pad)


def test_non_printable_firmware_bytes_come_out_escaped():
    sector = hand_built()
    put_ata_string(sector, 23, b"Q\x1b[0\xff\\", 4)
    assert parse_ata_identify(bytes(sector)).firmware == "Q\\x1b[0\\xff\\\\"


def test_capacity_uses_the_48_bit_count_of_words_100_to_103_when_non_zero():
    sector = hand_built(w60=0xFFFF, w61=0x0FFF)  # 28-bit count capped at 0FFFFFFFh
    struct.pack_into("<Q", sector, 200, 15_628_053_168)  # words 100-103, word 100 least significant
    parsed = parse_ata_identify(bytes(sector))
    assert parsed.user_capacity_bytes == 15_628_053_168 * 512
    assert parsed.logical_sector_size == 512


def test_capacity_falls_back_to_the_28_bit_count_of_words_60_61():
    sector = hand_built(w60=0x5678, w61=0x0123)  # word 60 is the low word
    assert parse_ata_identify(bytes(sector)).user_capacity_bytes == 0x01235678 * 512


def test_logical_sector_size_comes_from_words_117_118_in_words():
    # Word 106: bit 14 = 1 and bit 15 = 0 (valid), bit 12 = 1 (words 117-118 valid);
    # words 117-118 count WORDS, so 2048 words = 4096 bytes.
    sector = hand_built(w106=0x4000 | 0x1000, w117=2048, w118=0)
    struct.pack_into("<Q", sector, 200, 1_953_506_646)
    parsed = parse_ata_identify(bytes(sector))
    assert parsed.logical_sector_size == 4096
    assert parsed.user_capacity_bytes == 1_953_506_646 * 4096


def test_word_106_is_ignored_when_its_validity_bits_are_wrong():
    sector = hand_built(w106=0x8000 | 0x4000 | 0x1000, w117=2048, w60=1000)  # bit 15 set: invalid
    assert parse_ata_identify(bytes(sector)).logical_sector_size == 512


def test_a_logical_sector_shorter_than_512_bytes_is_rejected():
    sector = hand_built(w106=0x5000, w117=100)
    with pytest.raises(LayoutError) as err:
        parse_ata_identify(bytes(sector))
    assert err.value.field == "identify.logical_sector_size"


def test_wwn_reads_word_108_as_the_most_significant_word():
    # NAA 3h (locally assigned) identifier, made up.
    sector = hand_built(w108=0x3A11, w109=0xC0DE, w110=0x0000, w111=0x1234)
    assert parse_ata_identify(bytes(sector)).wwn == "3a11c0de00001234"


def test_all_zero_wwn_is_none():
    assert parse_ata_identify(bytes(hand_built())).wwn is None


@pytest.mark.parametrize(
    ("word217", "rpm"),
    [
        (0x0000, None),  # ACS-3 word 217: 0000h rate not reported
        (0x0001, 0),  # 0001h non-rotating media (solid state)
        (7200, 7200),  # 0401h-FFFEh nominal rate in rpm
        (0x0401, 0x0401),
        (0xFFFE, 0xFFFE),
        (0x0400, None),  # 0002h-0400h reserved
        (0xFFFF, None),  # FFFFh reserved
    ],
)
def test_rotation_rate_word_217(word217, rpm):
    assert parse_ata_identify(bytes(hand_built(w217=word217))).rotation_rpm == rpm


def test_integrity_word_with_the_right_checksum_is_accepted_and_reported():
    parsed = parse_ata_identify(bytes(seal(hand_built(w60=1000))))
    assert parsed.integrity_checked is True


def test_integrity_word_with_one_flipped_byte_is_rejected():
    sector = seal(hand_built(w60=1000))
    sector[100] ^= 0x01
    with pytest.raises(LayoutError) as err:
        parse_ata_identify(bytes(sector))
    assert err.value.field == "identify.integrity"


def test_without_the_a5h_signature_no_checksum_is_required():
    sector = hand_built(w60=1000)
    sector[511] = 0x5A  # garbage in the checksum byte, but low byte of word 255 is not A5h
    parsed = parse_ata_identify(bytes(sector))
    assert parsed.integrity_checked is False


@pytest.mark.parametrize("length", [0, 511, 513, 1024])
def test_a_sector_that_is_not_512_bytes_is_rejected(length):
    with pytest.raises(LayoutError) as err:
        parse_ata_identify(bytes(length))
    assert err.value.field == "identify.length"


def test_builder_layout_matches_the_standard_words():
    sector = build_ata_identify(
        serial="ABCD", firmware="QF01", model="QH-HD8T-A", sectors=0x1_2345_6789,
        wwn="3a11c0de00001234", rotation_rpm=5400,
    )
    assert sector[20:24] == b"BADC"  # ACS-3 3.3.10 byte order
    assert struct.unpack_from("<I", sector, 120)[0] == 0x0FFFFFFF  # words 60-61 capped
    assert struct.unpack_from("<Q", sector, 200)[0] == 0x1_2345_6789  # words 100-103
    assert struct.unpack_from("<H", sector, 166)[0] & (1 << 10)  # word 83 bit 10: 48-bit
    assert struct.unpack_from("<4H", sector, 216) == (0x3A11, 0xC0DE, 0x0000, 0x1234)
    assert struct.unpack_from("<H", sector, 434)[0] == 5400  # word 217
    assert sector[510] == 0xA5 and sum(sector) % 256 == 0  # word 255


@pytest.mark.parametrize(
    "kwargs",
    [
        dict(sectors=15_628_053_168, wwn="3a11c0de00000001", rotation_rpm=7200),
        dict(sectors=1000, rotation_rpm=0, integrity=False),
        dict(sectors=3_750_748_848, logical_sector_size=4096, rotation_rpm=None),
        dict(sectors=0x0FFFFFFF),
    ],
)
def test_builder_round_trips_through_the_parser(kwargs):
    sector = build_ata_identify(serial="QHB77120", firmware="QF02", model="Tallow 14T", **kwargs)
    parsed = parse_ata_identify(sector)
    size = kwargs.get("logical_sector_size", 512)
    assert (parsed.serial, parsed.firmware, parsed.model) == ("QHB77120", "QF02", "Tallow 14T")
    assert parsed.user_capacity_bytes == kwargs["sectors"] * size
    assert parsed.logical_sector_size == size
    assert parsed.wwn == kwargs.get("wwn")
    assert parsed.rotation_rpm == kwargs.get("rotation_rpm")
    assert parsed.integrity_checked == kwargs.get("integrity", True)


def test_builder_refuses_a_serial_longer_than_20_characters():
    with pytest.raises(ValueError, match="serial"):
        build_ata_identify(serial="Q" * 21, firmware="F", model="M", sectors=1)


def test_builder_refuses_a_reserved_rotation_rate():
    with pytest.raises(ValueError):
        build_ata_identify(serial="S", firmware="F", model="M", sectors=1, rotation_rpm=1000)


# -- batch decoder -------------------------------------------------------------------------------

def pick(rng: np.random.Generator, options: list):
    return options[int(rng.integers(len(options)))]


def random_identify_sectors(rng: np.random.Generator, count: int) -> np.ndarray:
    """Random sectors that hit every branch: odd string bytes, 28/48-bit counts, long logical
    sectors (some too short), WWNs, every rotation class, integrity words good and bad."""
    sectors = rng.integers(0, 256, size=(count, 512), dtype=np.uint8)
    alphabet = np.frombuffer(b"ABCQH-0123456789 \x00\x1b\\\xff", dtype=np.uint8)
    plain = rng.random(count) < 0.7  # most rows get ordinary strings, NUL/space padding
    for i in np.flatnonzero(plain):
        sector = bytearray(build_ata_identify(
            serial=b"QH%08d" % rng.integers(0, 10**8),
            firmware=bytes(rng.choice(alphabet[:16], size=rng.integers(0, 9))),
            model=b"Tallow %dT" % rng.integers(1, 30) + b"\x00" * int(rng.integers(0, 3)),
            sectors=pick(rng, [0, 1000, 0x0FFFFFFF, 15_628_053_168, 2**64 - 1]),
            logical_sector_size=pick(rng, [512, 4096]),
            wwn=pick(rng, [None, "3a11c0de%08x" % rng.integers(1, 2**32)]),
            rotation_rpm=pick(rng, [None, 0, 5400, 7200, 15000]),
            integrity=bool(rng.random() < 0.5),
        ))
        if rng.random() < 0.1:  # plant odd bytes in the firmware string
            sector[46:54] = bytes(rng.choice(alphabet, size=8))
        sectors[i] = np.frombuffer(bytes(sector), dtype=np.uint8)
    # Some random rows get a valid integrity word, some a signature with a wrong sum.
    signed = ~plain & (rng.random(count) < 0.5)
    sectors[signed, 510] = 0xA5
    for i in np.flatnonzero(signed):
        sectors[i, 511] = (-int(sectors[i, :511].sum())) % 256 + (0 if rng.random() < 0.5 else 1)
    # Some random rows announce a long logical sector, a few with a bad size.
    long_sector = ~plain & ~signed & (rng.random(count) < 0.5)
    sectors[long_sector, 212:214] = [0x00, 0x50]  # word 106 = 5000h
    sectors[long_sector, 235:238] = 0
    return sectors


def test_batch_decoder_equals_the_scalar_parser_on_random_sectors():
    rng = np.random.default_rng(20240611)
    sectors = random_identify_sectors(rng, 300)
    frame = decode_identify_batch(sectors)
    assert len(frame) == 300
    assert frame["rotation_rpm"].dtype == "Int64"
    seen_problems = set()
    for i in range(300):
        row = frame.iloc[i]
        try:
            expected = parse_ata_identify(sectors[i].tobytes())
        except LayoutError as err:
            assert row["problem"] == err.field
            assert row["integrity_ok"] == (err.field != "identify.integrity")
            seen_problems.add(err.field)
            continue
        assert row["problem"] is None
        assert row["integrity_ok"]
        assert row["serial"] == expected.serial
        assert row["firmware"] == expected.firmware
        assert row["model"] == expected.model
        assert row["user_capacity_bytes"] == min(expected.user_capacity_bytes, INT64_MAX)
        assert row["logical_sector_size"] == expected.logical_sector_size
        assert row["wwn"] == expected.wwn
        rpm = row["rotation_rpm"]
        assert (None if rpm is pd.NA else int(rpm)) == expected.rotation_rpm
    # The random data must have exercised both kinds of bad row.
    assert seen_problems == {"identify.integrity", "identify.logical_sector_size"}


def test_batch_decoder_of_an_empty_array_has_the_columns_and_no_rows():
    frame = decode_identify_batch(np.zeros((0, 512), dtype=np.uint8))
    assert len(frame) == 0
    assert {"serial", "firmware", "model", "user_capacity_bytes", "wwn", "rotation_rpm",
            "integrity_ok"} <= set(frame.columns)


def test_batch_decoder_rejects_the_wrong_width():
    with pytest.raises(LayoutError) as err:
        decode_identify_batch(np.zeros((3, 511), dtype=np.uint8))
    assert err.value.field == "identify.length"
