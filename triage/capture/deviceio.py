"""The ioctl boundary: open a device node read-only, send one SG_IO or NVMe admin request.

:class:`DeviceIO` is the one place the kernel is reached. Its three system calls (``open``,
``ioctl``, ``close``) are injectable so tests can replace exactly the kernel and nothing else:
the structures built here, the allow-list check and the decoding above run unchanged.
"""

from __future__ import annotations

import fcntl
import os
from typing import Callable

from triage.capture.commands import require_allowed
from triage.capture.nvme import NVME_IOCTL_ADMIN_CMD, NvmeStatus, build_admin_request
from triage.capture.sgio import SG_IO, SgResult, build_data_in_request

Handle = int

# O_RDONLY: no write access is asked for at all. O_NONBLOCK: do not wait for media on odd
# SCSI devices (common practice for pass-through opens, no source).
OPEN_FLAGS = os.O_RDONLY | os.O_NONBLOCK | getattr(os, "O_CLOEXEC", 0)


class DeviceIO:
    """Real device access through Linux ioctls.

    ``opener``, ``ioctl`` and ``closer`` default to ``os.open``, ``fcntl.ioctl`` and ``os.close``;
    ``ioctl(fd, request, buffer)`` must behave like ``fcntl.ioctl`` with a mutable buffer (write
    back into it, return the ioctl's int result, raise ``OSError`` on -1).
    """

    def __init__(
        self,
        *,
        opener: Callable[[str, int], int] = os.open,
        ioctl: Callable[..., int] = fcntl.ioctl,
        closer: Callable[[int], None] = os.close,
    ):
        self._open = opener
        self._ioctl = ioctl
        self._close = closer

    def open(self, path: str) -> Handle:
        return self._open(path, OPEN_FLAGS)

    def close(self, handle: Handle) -> None:
        self._close(handle)

    def sg_io(self, handle: Handle, cdb: bytes, length: int) -> SgResult:
        """One ATA PASS-THROUGH CDB from the allow-list, data-in, ``length`` bytes."""
        require_allowed("ata", cdb, length)
        request = build_data_in_request(cdb, length)
        self._ioctl(handle, SG_IO, request.header)
        return SgResult.from_request(request)

    def nvme_admin(self, handle: Handle, command: bytes, length: int) -> tuple[NvmeStatus, bytes]:
        """One NVMe admin command image from the allow-list; returns (completion status, data)."""
        require_allowed("nvme", command, length)
        request = build_admin_request(command, length)
        status = self._ioctl(handle, NVME_IOCTL_ADMIN_CMD, request.command)
        return NvmeStatus(int(status)), bytes(request.data.raw[:length])
