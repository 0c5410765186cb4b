"""SMART READ DATA, built by hand from ACS-3 "Device SMART data structure" (SMART READ DATA,
B0h/D0h; section numbers from memory) and SFF-8035i rev 2.0 3.8 attribute entries (12 bytes)."""

import struct

import numpy as np
import pytest

from triage.formats.ata_smart import (
    SmartAttribute,
    build_smart_data,
    decode_smart_batch,
    parse_smart_data,
)
from triage.formats.errors import LayoutError


def put_entry(sector, slot, attribute_id, flags, value, worst, raw6: bytes):
    """SFF-8035i entry: id, flags (LE word), value, worst, 6 raw bytes (LE), 1 reserved."""
    start = 2 + 12 * slot
    sector[start] = attribute_id
    struct.pack_into("<H", sector, start + 1, flags)
    sector[start + 3] = value
    sector[start + 4] = worst
    sector[start + 5 : start + 11] = raw6


def sum_to_zero(sector: bytearray) -> bytearray:
    """Byte 511: checksum, the two's complement of the sum of bytes 0-510 (ACS-3 / SFF-8035i)."""
    sector[511] = (-sum(sector[:511])) % 256
    return sector


def hand_built() -> bytearray:
    sector = bytearray(512)
    struct.pack_into("<H", sector, 0, 0x0010)  # bytes 0-1: revision 16
    put_entry(sector, 0, 5, 0x0033, 100, 99, bytes([1, 2, 3, 4, 5, 6]))
    # slot 1 left empty (id 0)
    put_entry(sector, 2, 194, 0x0022, 64, 41, bytes([36, 0, 0, 0, 0, 0]))
    put_entry(sector, 29, 197, 0x0012, 200, 200, bytes([0xFF] * 6))  # last slot, bytes 350-361
    sector[362] = 0x82  # off-line data collection status
    sector[363] = 0xF3  # self-test execution status (in progress, 30% remaining)
    struct.pack_into("<H", sector, 364, 1234)  # off-line collection time, seconds
    sector[367] = 0x5B  # off-line data collection capability
    struct.pack_into("<H", sector, 368, 0x0003)  # SMART capability
    sector[370] = 0x01  # error logging capability
    sector[372] = 2  # short self-test polling, minutes
    sector[373] = 0xFF  # extended polling: FFh = see bytes 375-376
    sector[374] = 5  # conveyance self-test polling, minutes
    struct.pack_into("<H", sector, 375, 1100)  # extended self-test polling, minutes (word)
    return sum_to_zero(sector)


def test_every_header_field_is_read_from_its_offset():
    parsed = parse_smart_data(bytes(hand_built()))
    assert parsed.revision == 16
    assert parsed.offline_status == 0x82
    assert parsed.self_test_status == 0xF3
    assert parsed.offline_collection_seconds == 1234
    assert parsed.offline_capability == 0x5B
    assert parsed.smart_capability == 0x0003
    assert parsed.error_logging_capability == 0x01
    assert parsed.short_test_minutes == 2
    assert parsed.conveyance_test_minutes == 5


def test_extended_polling_ffh_means_the_word_at_bytes_375_376():
    assert parse_smart_data(bytes(hand_built())).extended_test_minutes == 1100


def test_extended_polling_below_ffh_is_the_byte_itself():
    sector = hand_built()
    sector[373] = 90
    assert parse_smart_data(bytes(sum_to_zero(sector))).extended_test_minutes == 90


def test_attribute_entries_are_read_in_slot_order_and_empty_slots_skipped():
    attributes = parse_smart_data(bytes(hand_built())).attributes
    assert [a.id for a in attributes] == [5, 194, 197]
    first = attributes[0]
    assert (first.flags, first.value, first.worst) == (0x0033, 100, 99)


def test_raw_value_is_48_bit_little_endian():
    attributes = parse_smart_data(bytes(hand_built())).attributes
    # SFF-8035i raw bytes 01 02 03 04 05 06, least significant first.
    assert attributes[0].raw == 0x060504030201
    assert attributes[2].raw == 2**48 - 1


def test_flags_bit_0_marks_a_prefailure_attribute():
    attributes = parse_smart_data(bytes(hand_built())).attributes
    assert attributes[0].prefailure is True  # flags 0033h: bit 0 set
    assert attributes[1].prefailure is False  # flags 0022h: advisory


def test_a_sector_whose_bytes_do_not_sum_to_zero_is_rejected():
    sector = hand_built()
    sector[7] ^= 0x40
    with pytest.raises(LayoutError) as err:
        parse_smart_data(bytes(sector))
    assert err.value.field == "smart.checksum"


def test_a_sector_that_is_not_512_bytes_is_rejected():
    with pytest.raises(LayoutError) as err:
        parse_smart_data(bytes(hand_built())[:511])
    assert err.value.field == "smart.length"


def test_builder_writes_entries_and_checksum_where_the_standard_puts_them():
    sector = build_smart_data(
        [SmartAttribute(id=9, flags=0x0032, value=91, worst=91, raw=0x060504030201)]
    )
    assert sector[2] == 9 and struct.unpack_from("<H", sector, 3)[0] == 0x0032
    assert sector[5:7] == bytes([91, 91])
    assert sector[7:13] == bytes([1, 2, 3, 4, 5, 6])
    assert sector[14] == 0  # slot 1 empty
    assert sector[373] == 0xFF and struct.unpack_from("<H", sector, 375)[0] == 600
    assert sum(sector) % 256 == 0


def test_builder_round_trips_through_the_parser():
    attributes = (
        SmartAttribute(id=1, flags=0x000F, value=117, worst=99, raw=163_840_512),
        SmartAttribute(id=5, flags=0x0033, value=100, worst=100, raw=0),
        SmartAttribute(id=9, flags=0x0032, value=71, worst=71, raw=25_731),
        SmartAttribute(id=197, flags=0x0012, value=100, worst=100, raw=2**48 - 1),
    )
    parsed = parse_smart_data(
        build_smart_data(attributes, revision=10, self_test_status=0x21, short_test_minutes=1,
                         extended_test_minutes=80, conveyance_test_minutes=3)
    )
    assert parsed.attributes == attributes
    assert (parsed.revision, parsed.self_test_status) == (10, 0x21)
    assert (parsed.short_test_minutes, parsed.extended_test_minutes,
            parsed.conveyance_test_minutes) == (1, 80, 3)


def test_builder_refuses_a_raw_value_of_49_bits():
    with pytest.raises(ValueError):
        build_smart_data([SmartAttribute(id=5, flags=0, value=100, worst=100, raw=2**48)])


def test_builder_refuses_more_than_30_attributes():
    many = [SmartAttribute(id=i, flags=0, value=100, worst=100, raw=0) for i in range(1, 32)]
    with pytest.raises(ValueError):
        build_smart_data(many)


# -- batch decoder -------------------------------------------------------------------------------

def random_smart_sectors(rng: np.random.Generator, count: int) -> np.ndarray:
    """Random sectors, about a third of slots empty, checksums fixed except on a few rows."""
    sectors = rng.integers(0, 256, size=(count, 512), dtype=np.uint8)
    table = sectors[:, 2:362].reshape(count, 30, 12)
    table[rng.random((count, 30)) < 0.35, 0] = 0  # empty slots
    sectors[:, 511] = (-sectors[:, :511].sum(axis=1, dtype=np.int64)) % 256
    return sectors


def test_batch_decoder_equals_the_scalar_parser_on_random_sectors():
    rng = np.random.default_rng(7)
    sectors = random_smart_sectors(rng, 300)
    bad_rows = [3, 150, 299]
    sectors[bad_rows, 100] ^= 0x01  # one flipped bit breaks the checksum
    header, attributes = decode_smart_batch(sectors)

    assert len(header) == 300
    assert list(header.index[~header["checksum_ok"]]) == bad_rows
    for i in range(300):
        if i in bad_rows:
            with pytest.raises(LayoutError):
                parse_smart_data(sectors[i].tobytes())
            continue
        expected = parse_smart_data(sectors[i].tobytes())
        row = header.iloc[i]
        for name in ("revision", "offline_status", "self_test_status",
                     "offline_collection_seconds", "offline_capability", "smart_capability",
                     "error_logging_capability", "short_test_minutes", "extended_test_minutes",
                     "conveyance_test_minutes"):
            assert row[name] == getattr(expected, name), name
        mine = attributes[attributes["row"] == i]
        got = [SmartAttribute(*map(int, r)) for r in
               mine[["attribute_id", "status_flags", "normalized", "worst_normalized", "raw_value"]].itertuples(index=False)]
        assert got == list(expected.attributes)


def test_batch_attribute_rows_are_sorted_by_input_row_then_slot():
    sectors = np.stack([
        np.frombuffer(build_smart_data([SmartAttribute(i, 0, 1, 1, 0) for i in ids]), np.uint8)
        for ids in ([9, 5], [], [194, 1, 12])
    ])
    _, attributes = decode_smart_batch(sectors)
    assert list(zip(attributes["row"], attributes["attribute_id"])) == [
        (0, 9), (0, 5), (2, 194), (2, 1), (2, 12)
    ]
    assert str(attributes["raw_value"].dtype) == "int64"
