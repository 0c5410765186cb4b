"""Which device nodes to read: the host's drives from sysfs, or exactly the ones named.

Enumeration looks at ``/sys/block/sd*`` (SCSI disks, SATA drives among them) and
``/sys/class/nvme/nvme*`` (NVMe controllers), and leaves out what is not a local drive:

* partitions (a ``partition`` attribute), which share their disk's health;
* virtual devices: loop, ram, dm-, md, zram never match ``sd*``; anything else whose resolved
  sysfs path lies under ``/devices/virtual/`` is left out too;
* removable devices (``removable`` = 1) and disks with no medium (``size`` = 0);
* SCSI disks whose INQUIRY vendor is not ``ATA``: a SCSI / ATA translation layer reports "ATA"
  there (SAT-4, INQUIRY data translation, from memory), so anything else is a SAS or USB
  device that ATA PASS-THROUGH will not reach;
* NVMe controllers whose ``transport`` is not ``pcie`` (fabrics: the drive is in another box).

Every exclusion is reported with its reason, so a drive never disappears from the capture
silently; a device named on the command line is always tried.
"""

from __future__ import annotations

import os
import re
from dataclasses import dataclass
from pathlib import Path

SYSFS = Path("/sys")
DEV = "/dev"

_SCSI_DISK = re.compile(r"^sd[a-z]+$")
_SCSI_GENERIC = re.compile(r"^sg\d+$")
_NVME_CONTROLLER = re.compile(r"^nvme\d+$")
_NVME_NAMESPACE = re.compile(r"^nvme\d+n\d+$")


@dataclass(frozen=True)
class Target:
    """One device node to read and the bus its commands go over."""

    path: str
    bus: str  # "ata" | "nvme"


@dataclass(frozen=True)
class Skipped:
    path: str
    reason: str


def bus_of(path: str) -> str:
    """The bus for a device node named by the operator (symlinks such as /dev/disk/by-id/...
    are followed to find the kernel name). Raises ValueError for anything else."""
    name = os.path.basename(os.path.realpath(path))
    if _SCSI_DISK.match(name) or _SCSI_GENERIC.match(name):
        return "ata"
    if _NVME_CONTROLLER.match(name) or _NVME_NAMESPACE.match(name):
        return "nvme"
    raise ValueError(
        f"{path}: cannot tell how to read this device; expected /dev/sdX, /dev/sgN, "
        "/dev/nvmeN or /dev/nvmeNnM"
    )


def targets_for(paths: list[str]) -> list[Target]:
    """Exactly the named devices, in the order given; ValueError for a name that is not a drive."""
    return [Target(path, bus_of(path)) for path in paths]


def _read(path: Path) -> str | None:
    try:
        return path.read_text(encoding="ascii", errors="replace").strip()
    except OSError:
        return None


def enumerate_targets(sysfs: Path = SYSFS, dev: str = DEV) -> tuple[list[Target], list[Skipped]]:
    """The host's local SATA and NVMe drives, in name order, and what was left out and why."""
    ata: list[Target] = []
    nvme: list[Target] = []
    skipped: list[Skipped] = []

    block = sysfs / "block"
    # sda, sdb, ..., sdz, sdaa: the kernel's own order (shorter names first).
    names = sorted((p.name for p in block.iterdir()), key=lambda n: (len(n), n)) if block.is_dir() else []
    for name in names:
        if not _SCSI_DISK.match(name):
            continue  # NVMe namespaces come in through their controller; the rest is not ours
        node = f"{dev}/{name}"
        reason = _scsi_disk_exclusion(block / name)
        if reason:
            skipped.append(Skipped(node, reason))
        else:
            ata.append(Target(node, "ata"))

    nvme_class = sysfs / "class" / "nvme"
    controllers = (
        sorted((p.name for p in nvme_class.iterdir() if _NVME_CONTROLLER.match(p.name)), key=lambda n: int(n[4:]))
        if nvme_class.is_dir()
        else []
    )
    for name in controllers:
        entry = nvme_class / name
        node = f"{dev}/{name}"
        transport = _read(entry / "transport")
        if "/virtual/" in str(entry.resolve()):
            skipped.append(Skipped(node, "virtual device"))
        elif transport is not None and transport != "pcie":
            skipped.append(Skipped(node, f"NVMe over {transport}: not a local drive"))
        else:
            nvme.append(Target(node, "nvme"))

    return ata + nvme, skipped


def _scsi_disk_exclusion(entry: Path) -> str | None:
    if (entry / "partition").exists():
        return "partition"
    if "/virtual/" in str(entry.resolve()):
        return "virtual device"
    if _read(entry / "removable") == "1":
        return "removable device"
    if _read(entry / "size") == "0":
        return "no medium (size 0)"
    vendor = _read(entry / "device" / "vendor")
    if vendor is not None and vendor != "ATA" and not (entry / "device" / "vpd_pg89").exists():
        return f"SCSI vendor {vendor!r}, not behind an ATA translation layer"
    return None

