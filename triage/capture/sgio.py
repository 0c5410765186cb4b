"""The Linux SG_IO request header (``struct sg_io_hdr`` in <scsi/sg.h>) and how to read its answer.

SG_IO sends one SCSI command to a block device (``/dev/sdX``) or a SCSI generic node
(``/dev/sgN``) and waits for it. The header points at the CDB, at the data buffer and at a sense
buffer; on return the kernel fills in the SCSI status, the host adapter and driver status, the
number of sense bytes written and the residual count.
"""

from __future__ import annotations

import ctypes
from dataclasses import dataclass

from triage.capture.sense import Outcome, Sense, SenseError, classify, decode_sense

SG_IO = 0x2285  # <scsi/sg.h>
SG_INTERFACE_ID = ord("S")  # interface_id: 'S' for SCSI generic, required
SG_DXFER_FROM_DEV = -3  # <scsi/sg.h>: "e.g. a SCSI READ command"

SENSE_BUFFER_BYTES = 64  # descriptor sense with an ATA Status Return descriptor needs 22
DEFAULT_TIMEOUT_MS = 20_000  # common practice, no source: generous for a drive spinning up

# SAM-5 status codes (table "Status codes"); only the ones acted on.
SCSI_STATUS_GOOD = 0x00
SCSI_STATUS_CHECK_CONDITION = 0x02
SCSI_STATUS_BUSY = 0x08

# Linux host byte (DID_* in <scsi/scsi.h>, kernel-internal; values stable since 2.4).
HOST_STATUS = {
    0x00: "DID_OK",
    0x01: "DID_NO_CONNECT",
    0x02: "DID_BUS_BUSY",
    0x03: "DID_TIME_OUT",
    0x04: "DID_BAD_TARGET",
    0x05: "DID_ABORT",
    0x06: "DID_PARITY",
    0x07: "DID_ERROR",
    0x08: "DID_RESET",
    0x09: "DID_BAD_INTR",
}
DID_NO_CONNECT = 0x01
DID_TIME_OUT = 0x03
DID_BAD_TARGET = 0x04
DRIVER_TIMEOUT = 0x06  # driver byte, <scsi/sg.h> SG_ERR_DRIVER_TIMEOUT
DRIVER_SENSE = 0x08  # driver byte, <scsi/sg.h> SG_ERR_DRIVER_SENSE


class SgIoHdr(ctypes.Structure):
    """``sg_io_hdr_t`` exactly as declared in <scsi/sg.h>; ctypes applies the C ABI's padding."""

    _fields_ = [
        ("interface_id", ctypes.c_int),
        ("dxfer_direction", ctypes.c_int),
        ("cmd_len", ctypes.c_ubyte),
        ("mx_sb_len", ctypes.c_ubyte),
        ("iovec_count", ctypes.c_ushort),
        ("dxfer_len", ctypes.c_uint),
        ("dxferp", ctypes.c_void_p),
        ("cmdp", ctypes.c_void_p),
        ("sbp", ctypes.c_void_p),
        ("timeout", ctypes.c_uint),
        ("flags", ctypes.c_uint),
        ("pack_id", ctypes.c_int),
        ("usr_ptr", ctypes.c_void_p),
        ("status", ctypes.c_ubyte),
        ("masked_status", ctypes.c_ubyte),
        ("msg_status", ctypes.c_ubyte),
        ("sb_len_wr", ctypes.c_ubyte),
        ("host_status", ctypes.c_ushort),
        ("driver_status", ctypes.c_ushort),
        ("resid", ctypes.c_int),
        ("duration", ctypes.c_uint),
        ("info", ctypes.c_uint),
    ]


@dataclass
class SgRequest:
    """One data-in SG_IO request with the buffers the header points into (kept alive here)."""

    header: SgIoHdr
    cdb: ctypes.Array
    data: ctypes.Array
    sense: ctypes.Array


def build_data_in_request(cdb: bytes, length: int, timeout_ms: int = DEFAULT_TIMEOUT_MS) -> SgRequest:
    """An ``sg_io_hdr`` for a command that reads ``length`` bytes from the device."""
    if not 6 <= len(cdb) <= 16:
        raise ValueError(f"a CDB is 6 to 16 bytes, not {len(cdb)}")
    cdb_buffer = ctypes.create_string_buffer(bytes(cdb), len(cdb))
    data_buffer = ctypes.create_string_buffer(length)
    sense_buffer = ctypes.create_string_buffer(SENSE_BUFFER_BYTES)
    header = SgIoHdr()
    header.interface_id = SG_INTERFACE_ID
    header.dxfer_direction = SG_DXFER_FROM_DEV
    header.cmd_len = len(cdb)
    header.mx_sb_len = SENSE_BUFFER_BYTES
    header.iovec_count = 0
    header.dxfer_len = length
    header.dxferp = ctypes.addressof(data_buffer)
    header.cmdp = ctypes.addressof(cdb_buffer)
    header.sbp = ctypes.addressof(sense_buffer)
    header.timeout = timeout_ms
    header.flags = 0  # indirect I/O, the default
    return SgRequest(header, cdb_buffer, data_buffer, sense_buffer)


@dataclass(frozen=True)
class SgResult:
    """What the kernel wrote back into the header after SG_IO."""

    data: bytes
    sense: bytes
    status: int
    host_status: int
    driver_status: int
    resid: int
    info: int

    @classmethod
    def from_request(cls, request: SgRequest) -> "SgResult":
        h = request.header
        sense_len = min(h.sb_len_wr, SENSE_BUFFER_BYTES)
        return cls(
            data=bytes(request.data.raw[: h.dxfer_len]),
            sense=bytes(request.sense.raw[:sense_len]),
            status=h.status,
            host_status=h.host_status,
            driver_status=h.driver_status,
            resid=h.resid,
            info=h.info,
        )


@dataclass(frozen=True)
class SgVerdict:
    """How one SG_IO exchange ended, for the caller to act on."""

    outcome: Outcome
    detail: str
    sense: Sense | None = None


def judge(result: SgResult, expected_length: int) -> SgVerdict:
    """Read the status bytes, sense data and residual count of one completed SG_IO call.

    The order matters: a transport failure (host byte) means the sense buffer is meaningless;
    sense data, when present, says more than the bare status; a clean status with a residual
    means the device sent less than the one sector asked for.
    """
    if result.host_status == DID_TIME_OUT or (result.driver_status & 0x0F) == DRIVER_TIMEOUT:
        return SgVerdict(Outcome.OTHER, "timed out")
    if result.host_status in (DID_NO_CONNECT, DID_BAD_TARGET):
        name = HOST_STATUS[result.host_status]
        return SgVerdict(Outcome.OTHER, f"device not reachable (host status {name})")
    if result.host_status != 0:
        name = HOST_STATUS.get(result.host_status, f"{result.host_status:#x}")
        return SgVerdict(Outcome.OTHER, f"host adapter error (host status {name})")
    if result.sense:
        try:
            sense = decode_sense(result.sense)
        except SenseError as exc:
            return SgVerdict(Outcome.OTHER, f"unreadable sense data: {exc}")
        outcome = classify(sense)
        if outcome is not Outcome.OK:
            return SgVerdict(outcome, sense.describe(), sense)
    elif result.status == SCSI_STATUS_CHECK_CONDITION:
        return SgVerdict(Outcome.OTHER, "CHECK CONDITION without sense data")
    if result.status == SCSI_STATUS_BUSY:
        return SgVerdict(Outcome.RETRY, "device busy")
    if result.status not in (SCSI_STATUS_GOOD, SCSI_STATUS_CHECK_CONDITION):
        return SgVerdict(Outcome.OTHER, f"SCSI status {result.status:02x}h")
    if result.resid != 0:
        got = expected_length - result.resid
        return SgVerdict(Outcome.OTHER, f"short transfer: {got} of {expected_length} bytes")
    return SgVerdict(Outcome.OK, "")
