"""The three ATA PASS-THROUGH (16) CDBs, checked byte by byte against SAT-4 and ACS.

Every expected CDB below is written out by hand from SAT-4 clause 12.2, table "ATA PASS-THROUGH
(16) command" (byte 0 OPERATION CODE 85h; byte 1 PROTOCOL bits 4:1, EXTEND bit 0; byte 2
OFF_LINE 7:6, CK_COND 5, T_TYPE 4, T_DIR 3, BYT_BLOK 2, T_LENGTH 1:0; bytes 3/4 FEATURES 15:8/7:0;
5/6 COUNT; 7/8 LBA 31:24 / 7:0; 9/10 LBA 39:32 / 15:8; 11/12 LBA 47:40 / 23:16; 13 DEVICE;
14 COMMAND; 15 CONTROL), table "PROTOCOL field" (4 = PIO Data-In) and table "T_LENGTH field"
(2 = transfer length in the COUNT field). Clause/table numbers from memory; the layout is the
one Linux libata-scsi.c decodes (cdb[4] feature, cdb[6] nsect, cdb[8]/[10]/[12] LBA low/mid/high,
cdb[13] device, cdb[14] command).
"""

from __future__ import annotations

import pytest

from triage.capture import sat

#                 byte: 0     1     2     3     4     5     6     7     8     9     10    11    12    13    14    15
IDENTIFY_DEVICE = bytes([0x85, 0x08, 0x0E, 0x00, 0x00, 0x00, 0x01, 0x00, 0x00, 0x00, 0x00, 0x00, 0x00, 0x00, 0xEC, 0x00])
SMART_READ_DATA = bytes([0x85, 0x08, 0x0E, 0x00, 0xD0, 0x00, 0x01, 0x00, 0x00, 0x00, 0x4F, 0x00, 0xC2, 0x00, 0xB0, 0x00])
SMART_READ_THRESHOLDS = bytes([0x85, 0x08, 0x0E, 0x00, 0xD1, 0x00, 0x01, 0x00, 0x00, 0x00, 0x4F, 0x00, 0xC2, 0x00, 0xB0, 0x00])


def test_identify_device_cdb_matches_the_sat4_table_byte_by_byte():
    # byte 1 = PROTOCOL 4 (PIO Data-In) << 1, EXTEND 0; byte 2 = T_DIR 1 (08h) | BYT_BLOK 1 (04h)
    # | T_LENGTH 2 (02h) = 0Eh; COUNT(7:0) = 1 sector; COMMAND = ECh (ACS-4 IDENTIFY DEVICE)
    assert sat.identify_device_cdb() == IDENTIFY_DEVICE


def test_smart_read_data_cdb_carries_feature_d0_and_the_4f_c2_signature():
    # ACS-3 SMART READ DATA: COMMAND B0h, FEATURE D0h, LBA(15:8) 4Fh, LBA(23:16) C2h
    assert sat.smart_read_data_cdb() == SMART_READ_DATA


def test_smart_read_thresholds_cdb_differs_from_smart_read_data_only_in_the_feature():
    # ATA-7 SMART READ ATTRIBUTE THRESHOLDS: FEATURE D1h (obsolete since ACS-2)
    cdb = sat.smart_read_thresholds_cdb()
    assert cdb == SMART_READ_THRESHOLDS
    assert [i for i in range(16) if cdb[i] != SMART_READ_DATA[i]] == [4]


def test_every_cdb_is_a_28_bit_pio_data_in_read_from_the_device():
    for cdb in (sat.identify_device_cdb(), sat.smart_read_data_cdb(), sat.smart_read_thresholds_cdb()):
        assert len(cdb) == 16 and cdb[0] == 0x85  # SAT-4: ATA PASS-THROUGH (16) is 85h
        assert (cdb[1] >> 1) & 0x0F == 4  # PROTOCOL (bits 4:1) = PIO Data-In
        assert cdb[1] & 0x01 == 0  # EXTEND = 0: the 28-bit form of the command
        assert cdb[2] & 0x08  # T_DIR = 1: from the ATA device
        assert cdb[2] & 0x20 == 0  # CK_COND = 0: no sense data on success
        assert cdb[2] & 0x03 == 2  # T_LENGTH = 2: length in COUNT


@pytest.mark.parametrize("field", ["command", "features", "sectors", "lba_mid", "device"])
def test_a_register_wider_than_one_byte_is_refused(field):
    arguments = {"command": 0xEC, field: 0x100}
    with pytest.raises(ValueError, match=field):
        sat.pio_data_in_cdb(**arguments)


def test_a_zero_sector_transfer_is_refused():
    with pytest.raises(ValueError, match="at least one sector"):
        sat.pio_data_in_cdb(0xEC, sectors=0)
