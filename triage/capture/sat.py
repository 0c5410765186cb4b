"""ATA commands wrapped in the SCSI ATA PASS-THROUGH (16) command (SCSI / ATA Translation, SAT-4).

A SATA drive is reached through a SCSI layer (Linux libata, or a SAS host adapter): the ATA
command travels inside a 16-byte SCSI CDB that the translation layer unwraps. The layout is SAT-4
clause 12.2 "ATA PASS-THROUGH commands", table "ATA PASS-THROUGH (16) command" (clause and
table numbering from memory; the byte layout is the one every SAT revision since SAT-1 uses)::

    byte 0   OPERATION CODE (85h)
    byte 1   bits 7:5 obsolete (was MULTIPLE_COUNT) | bits 4:1 PROTOCOL | bit 0 EXTEND
    byte 2   bits 7:6 OFF_LINE | bit 5 CK_COND | bit 4 T_TYPE | bit 3 T_DIR | bit 2 BYT_BLOK
             | bits 1:0 T_LENGTH
    byte 3   FEATURES (15:8)      byte 4   FEATURES (7:0)
    byte 5   COUNT (15:8)         byte 6   COUNT (7:0)
    byte 7   LBA (31:24)          byte 8   LBA (7:0)        ("LBA low")
    byte 9   LBA (39:32)          byte 10  LBA (15:8)       ("LBA mid")
    byte 11  LBA (47:40)          byte 12  LBA (23:16)      ("LBA high")
    byte 13  DEVICE               byte 14  COMMAND          byte 15  CONTROL

Only 28-bit commands are sent here (EXTEND = 0), so the (15:8)/upper bytes stay zero.
"""

from __future__ import annotations

OPCODE_ATA_PASS_THROUGH_16 = 0x85
CDB_LENGTH = 16
SECTOR_BYTES = 512

# SAT-4 table "PROTOCOL field" (from memory): 3 = non-data, 4 = PIO data-in, 5 = PIO data-out.
PROTOCOL_PIO_DATA_IN = 4

# SAT-4 byte 2 flags (from memory; the same bits in SAT-2 and SAT-3).
T_DIR_FROM_DEVICE = 0x08  # bit 3: data moves from the ATA device to the host
BYT_BLOK_BLOCKS = 0x04  # bit 2: the transfer length counts 512-byte blocks, not bytes
T_LENGTH_IN_COUNT = 0x02  # bits 1:0 = 2: the transfer length is in the COUNT field

# ACS-4 command codes (table "Command codes", from memory).
ATA_IDENTIFY_DEVICE = 0xEC
ATA_SMART = 0xB0
SMART_READ_DATA_FEATURE = 0xD0
SMART_READ_THRESHOLDS_FEATURE = 0xD1  # obsolete in ACS-2 and later, still widely answered
# ACS-4 SMART feature set: every SMART command carries these two signature bytes in LBA mid /
# LBA high so a stray B0h cannot trigger it by accident.
SMART_LBA_MID = 0x4F
SMART_LBA_HIGH = 0xC2


def pio_data_in_cdb(
    command: int,
    *,
    features: int = 0,
    sectors: int = 1,
    lba_low: int = 0,
    lba_mid: int = 0,
    lba_high: int = 0,
    device: int = 0,
) -> bytes:
    """The 16-byte ATA PASS-THROUGH (16) CDB for a 28-bit PIO data-in command.

    The number of 512-byte sectors to read goes in COUNT (T_LENGTH = 2, BYT_BLOK = 1), so the
    translation layer knows how much data to expect even for commands (IDENTIFY DEVICE, SMART
    READ DATA) whose own COUNT field is "N/A" in ACS.
    """
    for name, value in (
        ("command", command),
        ("features", features),
        ("sectors", sectors),
        ("lba_low", lba_low),
        ("lba_mid", lba_mid),
        ("lba_high", lba_high),
        ("device", device),
    ):
        if not 0 <= value <= 0xFF:
            raise ValueError(f"ATA register {name}={value:#x} does not fit in one byte")
    if sectors == 0:
        raise ValueError("a PIO data-in command must read at least one sector")
    cdb = bytearray(CDB_LENGTH)
    cdb[0] = OPCODE_ATA_PASS_THROUGH_16
    cdb[1] = PROTOCOL_PIO_DATA_IN << 1  # EXTEND (bit 0) = 0: 28-bit command
    cdb[2] = T_DIR_FROM_DEVICE | BYT_BLOK_BLOCKS | T_LENGTH_IN_COUNT  # CK_COND = 0, OFF_LINE = 0
    cdb[4] = features
    cdb[6] = sectors
    cdb[8] = lba_low
    cdb[10] = lba_mid
    cdb[12] = lba_high
    cdb[13] = device
    cdb[14] = command
    return bytes(cdb)


def identify_device_cdb() -> bytes:
    """IDENTIFY DEVICE (ECh): one 512-byte sector of device data (ACS-4, "IDENTIFY DEVICE")."""
    return pio_data_in_cdb(ATA_IDENTIFY_DEVICE)


def smart_read_data_cdb() -> bytes:
    """SMART READ DATA (B0h/D0h): the 512-byte device SMART data structure (ACS-3 SMART feature set)."""
    return pio_data_in_cdb(
        ATA_SMART,
        features=SMART_READ_DATA_FEATURE,
        lba_mid=SMART_LBA_MID,
        lba_high=SMART_LBA_HIGH,
    )


def smart_read_thresholds_cdb() -> bytes:
    """SMART READ THRESHOLDS (B0h/D1h): the 512-byte threshold sector (ATA-7, obsolete since ACS-2)."""
    return pio_data_in_cdb(
        ATA_SMART,
        features=SMART_READ_THRESHOLDS_FEATURE,
        lba_mid=SMART_LBA_MID,
        lba_high=SMART_LBA_HIGH,
    )
