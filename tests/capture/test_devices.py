"""Which drives a run reads: sysfs enumeration (a hand-built sysfs tree) and named devices.

The tree mimics the Linux sysfs layout (Documentation/ABI/stable/sysfs-block,
sysfs-class-nvme): /sys/block/<name> and /sys/class/nvme/<ctrl> are symlinks into /sys/devices.
"""

from __future__ import annotations

import os
from pathlib import Path

import pytest

from triage.capture.devices import Target, bus_of, enumerate_targets, targets_for

PCI = "devices/pci0000:00/0000:00:17.0"


def disk(sysfs: Path, name: str, where: str, *, removable="0", size="15628053168", vendor="ATA     ",
         partitions=(), vpd_pg89=False):
    real = sysfs / where / "block" / name
    (real / "device").mkdir(parents=True)
    (real / "removable").write_text(removable + "\n")
    (real / "size").write_text(size + "\n")
    if vendor is not None:
        (real / "device" / "vendor").write_text(vendor + "\n")
    if vpd_pg89:
        (real / "device" / "vpd_pg89").write_bytes(b"\x00\x89")
    for part in partitions:
        (real / part).mkdir()
        (real / part / "partition").write_text("1\n")
    (sysfs / "block").mkdir(exist_ok=True)
    os.symlink(os.path.relpath(real, sysfs / "block"), sysfs / "block" / name)


def controller(sysfs: Path, name: str, where: str, transport="pcie"):
    real = sysfs / where / "nvme" / name
    real.mkdir(parents=True)
    (real / "transport").write_text(transport + "\n")
    (sysfs / "class" / "nvme").mkdir(parents=True, exist_ok=True)
    os.symlink(os.path.relpath(real, sysfs / "class" / "nvme"), sysfs / "class" / "nvme" / name)


@pytest.fixture
def sysfs(tmp_path):
    root = tmp_path / "sys"
    disk(root, "sda", f"{PCI}/ata1/host0/target0:0:0/0:0:0:0", partitions=("sda1", "sda2"))
    disk(root, "sdb", f"{PCI}/ata2/host1/target1:0:0/1:0:0:0")
    disk(root, "sdaa", f"{PCI}/ata9/host8/target8:0:0/8:0:0:0")
    disk(root, "sdc", f"{PCI}/usb1/1-1/host9/target9:0:0/9:0:0:0", removable="1", vendor="QUILLMR ")
    disk(root, "sdd", f"{PCI}/host2/port-2:0/end_device-2:0/target2:0:0/2:0:0:0", vendor="QHSAS   ")
    disk(root, "sde", f"{PCI}/host2/port-2:1/end_device-2:1/target2:0:1/2:0:1:0", vendor="QHSATL  ",
         vpd_pg89=True)  # SATA drive behind a SAS adapter whose SATL names itself
    disk(root, "sdf", f"{PCI}/usb2/2-1/host10/target10:0:0/10:0:0:0", size="0")
    disk(root, "sdg", "devices/virtual/scsi_fake/host11/target11:0:0/11:0:0:0")
    disk(root, "loop0", "devices/virtual/block_fake", vendor=None)
    controller(root, "nvme0", "devices/pci0000:00/0000:00:1d.0/0000:3d:00.0")
    controller(root, "nvme10", "devices/pci0000:00/0000:00:1d.4/0000:3e:00.0")
    controller(root, "nvme2", "devices/pci0000:00/0000:00:1d.2/0000:3f:00.0")
    controller(root, "nvme3", "devices/virtual/nvme-fabrics/ctl", transport="tcp")
    return root


def test_local_sata_and_nvme_drives_are_found_in_kernel_order(sysfs):
    targets, _ = enumerate_targets(sysfs)
    assert targets == [
        Target("/dev/sda", "ata"), Target("/dev/sdb", "ata"), Target("/dev/sde", "ata"),
        Target("/dev/sdaa", "ata"),
        Target("/dev/nvme0", "nvme"), Target("/dev/nvme2", "nvme"), Target("/dev/nvme10", "nvme"),
    ]


def test_every_left_out_device_comes_with_its_reason(sysfs):
    _, skipped = enumerate_targets(sysfs)
    reasons = {s.path: s.reason for s in skipped}
    assert reasons["/dev/sdc"] == "removable device"
    assert reasons["/dev/sdd"].startswith("SCSI vendor 'QHSAS'")
    assert reasons["/dev/sdf"] == "no medium (size 0)"
    assert reasons["/dev/sdg"] == "virtual device"
    assert reasons["/dev/nvme3"] == "virtual device"


def test_partitions_and_non_disk_block_devices_are_never_targets(sysfs):
    targets, skipped = enumerate_targets(sysfs)
    names = {t.path for t in targets} | {s.path for s in skipped}
    assert not names & {"/dev/sda1", "/dev/sda2", "/dev/loop0"}


def test_a_partition_listed_directly_is_skipped_as_a_partition(sysfs):
    part = sysfs / "block" / "sdz"
    real = sysfs / "devices" / "fake" / "sdz"
    real.mkdir(parents=True)
    (real / "partition").write_text("1\n")
    os.symlink(real, part)
    _, skipped = enumerate_targets(sysfs)
    assert {s.path: s.reason for s in skipped}["/dev/sdz"] == "partition"


def test_nvme_over_fabrics_outside_virtual_is_left_out_by_transport(tmp_path):
    controller(tmp_path, "nvme0", "devices/platform/fc_host0", transport="fc")
    targets, skipped = enumerate_targets(tmp_path)
    assert targets == [] and skipped[0].reason == "NVMe over fc: not a local drive"


def test_a_host_without_block_or_nvme_class_has_no_targets(tmp_path):
    assert enumerate_targets(tmp_path) == ([], [])


@pytest.mark.parametrize(
    "path, bus",
    [("/dev/sda", "ata"), ("/dev/sdab", "ata"), ("/dev/sg3", "ata"), ("/dev/nvme0", "nvme"), ("/dev/nvme1n1", "nvme")],
)
def test_named_devices_get_their_bus_from_the_kernel_name(path, bus):
    assert bus_of(path) == bus


def test_named_devices_are_taken_exactly_in_the_order_given():
    assert targets_for(["/dev/nvme1", "/dev/sdb"]) == [Target("/dev/nvme1", "nvme"), Target("/dev/sdb", "ata")]


def test_a_by_id_symlink_is_followed_to_find_the_bus_and_kept_as_named(tmp_path):
    (tmp_path / "nvme4").touch()
    link = tmp_path / "nvme-Corvid_NV1920_CNV1920A0042"
    link.symlink_to(tmp_path / "nvme4")
    assert targets_for([str(link)]) == [Target(str(link), "nvme")]


@pytest.mark.parametrize("path", ["/dev/sda1", "/dev/md0", "/dev/loop0", "/dev/nvme0n1p2"])
def test_a_named_device_that_is_not_a_drive_is_a_usage_error(path):
    with pytest.raises(ValueError, match="cannot tell how to read"):
        targets_for([path])
