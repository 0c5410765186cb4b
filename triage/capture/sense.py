"""SCSI sense data (SPC-4 §4.5) and the ATA registers a translation layer returns inside it (SAT).

When an ATA PASS-THROUGH command fails, the translation layer answers CHECK CONDITION with sense
data in one of two formats:

* fixed format, response code 70h (current) / 71h (deferred), SPC-4 §4.5.3 table "Fixed format
  sense data": byte 2 bits 3:0 SENSE KEY, byte 7 ADDITIONAL SENSE LENGTH, byte 12 ASC, byte 13
  ASCQ. For ATA PASS-THROUGH, SAT puts the ATA registers in the INFORMATION field (bytes 3-6:
  ERROR, STATUS, DEVICE, COUNT(7:0)) and the COMMAND-SPECIFIC INFORMATION field (byte 8 flags:
  EXTEND 80h, COUNT UPPER NONZERO 40h, LBA UPPER NONZERO 20h; bytes 9-11 LBA 7:0, 15:8, 23:16):
  SAT-5 tables 212 and 213 "Fixed format sense data INFORMATION / COMMAND-SPECIFIC INFORMATION
  field for ATA PASS-THROUGH".
* descriptor format, response code 72h / 73h, SPC-4 §4.5.2: byte 1 bits 3:0 SENSE KEY, byte 2
  ASC, byte 3 ASCQ, byte 7 ADDITIONAL SENSE LENGTH, descriptors from byte 8, each
  ``[type, additional length, ...]``. The ATA registers come in the ATA Status Return descriptor,
  type 09h, additional length 0Ch (SAT-4, "ATA Status Return sense data descriptor", from
  memory): byte 2 bit 0 EXTEND, byte 3 ERROR, bytes 4-5 COUNT (15:8, 7:0), bytes 6-11 LBA
  (31:24, 7:0, 39:32, 15:8, 47:40, 23:16), byte 12 DEVICE, byte 13 STATUS.
"""

from __future__ import annotations

from dataclasses import dataclass
from enum import Enum

# SPC-4 table "Sense key descriptions".
SENSE_KEYS = {
    0x0: "NO SENSE",
    0x1: "RECOVERED ERROR",
    0x2: "NOT READY",
    0x3: "MEDIUM ERROR",
    0x4: "HARDWARE ERROR",
    0x5: "ILLEGAL REQUEST",
    0x6: "UNIT ATTENTION",
    0x7: "DATA PROTECT",
    0x8: "BLANK CHECK",
    0x9: "VENDOR SPECIFIC",
    0xA: "COPY ABORTED",
    0xB: "ABORTED COMMAND",
    0xC: "RESERVED",
    0xD: "VOLUME OVERFLOW",
    0xE: "MISCOMPARE",
    0xF: "COMPLETED",
}
NO_SENSE = 0x0
RECOVERED_ERROR = 0x1
NOT_READY = 0x2
MEDIUM_ERROR = 0x3
HARDWARE_ERROR = 0x4
ILLEGAL_REQUEST = 0x5
UNIT_ATTENTION = 0x6
ABORTED_COMMAND = 0xB

# The additional sense codes this module names (SPC-4 Annex D "ASC and ASCQ assignments").
ADDITIONAL_SENSE = {
    (0x00, 0x00): "NO ADDITIONAL SENSE INFORMATION",
    (0x00, 0x1D): "ATA PASS THROUGH INFORMATION AVAILABLE",
    (0x04, 0x00): "LOGICAL UNIT NOT READY, CAUSE NOT REPORTABLE",
    (0x11, 0x00): "UNRECOVERED READ ERROR",
    (0x20, 0x00): "INVALID COMMAND OPERATION CODE",
    (0x24, 0x00): "INVALID FIELD IN CDB",
    (0x25, 0x00): "LOGICAL UNIT NOT SUPPORTED",
    (0x29, 0x00): "POWER ON, RESET, OR BUS DEVICE RESET OCCURRED",
    (0x3A, 0x00): "MEDIUM NOT PRESENT",
    (0x44, 0x00): "INTERNAL TARGET FAILURE",
}
ASC_INVALID_COMMAND_OPERATION_CODE = 0x20
ASC_INVALID_FIELD_IN_CDB = 0x24

ATA_STATUS_RETURN_DESCRIPTOR = 0x09

# ATA status and error register bits (ACS-4 "Normal and Error Outputs", from memory).
ATA_STATUS_ERR = 0x01  # bit 0: ERROR (CHECK CONDITION in ACS-3 and later)
ATA_STATUS_DF = 0x20  # bit 5: DEVICE FAULT
ATA_STATUS_BSY = 0x80  # bit 7: BUSY
ATA_ERROR_ABRT = 0x04  # bit 2: ABORT: the device did not execute the command


class SenseError(ValueError):
    """The sense bytes do not follow either SPC-4 format."""


@dataclass(frozen=True)
class AtaRegisters:
    """The ATA output registers after the command (from the sense data)."""

    error: int
    status: int
    device: int
    count: int
    lba: int
    extend: bool

    @property
    def aborted(self) -> bool:
        """ERR set with ABRT: the device refused the command (ACS-4 error outputs)."""
        return bool(self.status & ATA_STATUS_ERR) and bool(self.error & ATA_ERROR_ABRT)

    @property
    def failed(self) -> bool:
        return bool(self.status & (ATA_STATUS_ERR | ATA_STATUS_DF))

    def describe(self) -> str:
        flags = [
            name
            for bit, name in ((ATA_STATUS_BSY, "BSY"), (ATA_STATUS_DF, "DF"), (ATA_STATUS_ERR, "ERR"))
            if self.status & bit
        ]
        text = f"ATA status {self.status:02x}h"
        if flags:
            text += " (" + " ".join(flags) + ")"
        text += f", error {self.error:02x}h"
        if self.error & ATA_ERROR_ABRT:
            text += " (ABRT)"
        return text


@dataclass(frozen=True)
class Sense:
    """Decoded sense data: key, additional sense code and qualifier, ATA registers if sent."""

    response_code: int
    sense_key: int
    asc: int
    ascq: int
    ata: AtaRegisters | None

    @property
    def descriptor_format(self) -> bool:
        return self.response_code in (0x72, 0x73)

    @property
    def deferred(self) -> bool:
        return self.response_code in (0x71, 0x73)

    def describe(self) -> str:
        """One line for an operator: names from SPC-4, hex codes always shown."""
        key = SENSE_KEYS[self.sense_key]
        text = f"sense key {self.sense_key:X}h {key}, ASC/ASCQ {self.asc:02X}h/{self.ascq:02X}h"
        name = ADDITIONAL_SENSE.get((self.asc, self.ascq))
        if name:
            text += f" {name}"
        if self.ata is not None:
            text += f"; {self.ata.describe()}"
        return text


def decode_sense(sense: bytes) -> Sense:
    """Decode fixed (70h/71h) or descriptor (72h/73h) format sense data (SPC-4 §4.5)."""
    if len(sense) < 2:
        raise SenseError(f"sense data too short ({len(sense)} bytes)")
    response_code = sense[0] & 0x7F
    if response_code in (0x70, 0x71):
        return _decode_fixed(sense, response_code)
    if response_code in (0x72, 0x73):
        return _decode_descriptor(sense, response_code)
    raise SenseError(f"unknown sense response code {response_code:02x}h")


def _byte(data: bytes, index: int) -> int:
    return data[index] if index < len(data) else 0


def _decode_fixed(sense: bytes, response_code: int) -> Sense:
    if len(sense) < 3:
        raise SenseError(f"fixed format sense data too short ({len(sense)} bytes)")
    sense_key = sense[2] & 0x0F
    ata = None
    # The ATA registers are present when the INFORMATION field is marked valid (byte 0 bit 7,
    # SPC-4) or the code says so (00h/1Dh); SAT-5 tables 212 / 213 give their places. Without
    # either, bytes 3-11 belong to the target (an LBA, or nothing) and are not ATA registers.
    asc, ascq = _byte(sense, 12), _byte(sense, 13)
    information_valid = bool(sense[0] & 0x80) or (asc, ascq) == (0x00, 0x1D)
    if len(sense) >= 12 and information_valid:
        flags = sense[8]
        ata = AtaRegisters(
            error=sense[3],
            status=sense[4],
            device=sense[5],
            count=sense[6],
            lba=sense[9] | (sense[10] << 8) | (sense[11] << 16),
            extend=bool(flags & 0x80),
        )
    return Sense(response_code, sense_key, asc, ascq, ata)


def _decode_descriptor(sense: bytes, response_code: int) -> Sense:
    if len(sense) < 4:
        raise SenseError(f"descriptor format sense data too short ({len(sense)} bytes)")
    sense_key = sense[1] & 0x0F
    ata = None
    end = min(len(sense), 8 + _byte(sense, 7))
    offset = 8
    while offset + 2 <= end:
        kind, length = sense[offset], sense[offset + 1]
        descriptor = sense[offset : offset + 2 + length]
        if kind == ATA_STATUS_RETURN_DESCRIPTOR and len(descriptor) >= 14:
            d = descriptor
            ata = AtaRegisters(
                error=d[3],
                status=d[13],
                device=d[12],
                count=(d[4] << 8) | d[5],
                lba=d[7] | (d[9] << 8) | (d[11] << 16) | (d[6] << 24) | (d[8] << 32) | (d[10] << 40),
                extend=bool(d[2] & 0x01),
            )
        offset += 2 + length
    return Sense(response_code, sense_key, sense[2], sense[3], ata)


class Outcome(Enum):
    """What a sense report means for the capture of one payload."""

    OK = "ok"  # the data arrived; the sense only carried information
    RETRY = "retry"  # a reset or similar event was reported; the command did not run
    NOT_SUPPORTED = "not supported"
    ABORTED = "command aborted"
    NOT_READY = "not ready"
    MEDIUM_ERROR = "medium error"
    HARDWARE_ERROR = "hardware error"
    OTHER = "device error"


def classify(sense: Sense) -> Outcome:
    """Map decoded sense data to what the capture does next.

    * ILLEGAL REQUEST with INVALID COMMAND OPERATION CODE (20h) or INVALID FIELD IN CDB (24h): the
      translation layer or the drive does not support the command (a SAS drive, a bridge without
      ATA pass-through, an ATA command the drive lacks).
    * ABORTED COMMAND, or ATA status ERR with ABRT in the error register: the drive refused it
      (e.g. SMART READ DATA while SMART is disabled).
    * NO SENSE / RECOVERED ERROR without an ATA error: information only (CK_COND-style returns,
      ASC/ASCQ 00h/1Dh ATA PASS THROUGH INFORMATION AVAILABLE).
    * UNIT ATTENTION: the command was not executed (SPC-4 §5.14); it is worth one retry.
    """
    ata_failed = sense.ata is not None and sense.ata.failed
    if sense.sense_key in (NO_SENSE, RECOVERED_ERROR) and not ata_failed:
        return Outcome.OK
    if sense.sense_key == UNIT_ATTENTION:
        return Outcome.RETRY
    if sense.sense_key == ILLEGAL_REQUEST and sense.asc in (
        ASC_INVALID_COMMAND_OPERATION_CODE,
        ASC_INVALID_FIELD_IN_CDB,
    ):
        return Outcome.NOT_SUPPORTED
    if sense.sense_key == ABORTED_COMMAND or (sense.ata is not None and sense.ata.aborted):
        return Outcome.ABORTED
    if sense.sense_key == NOT_READY:
        return Outcome.NOT_READY
    if sense.sense_key == MEDIUM_ERROR:
        return Outcome.MEDIUM_ERROR
    if sense.sense_key == HARDWARE_ERROR:
        return Outcome.HARDWARE_ERROR
    if sense.sense_key == ILLEGAL_REQUEST:
        return Outcome.NOT_SUPPORTED
    return Outcome.OTHER
