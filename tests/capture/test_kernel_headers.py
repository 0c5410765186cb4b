"""The ctypes structures against the real C headers, compiled by the system's C compiler.

An independent check of the byte layouts: the compiler reads <scsi/sg.h> and <linux/nvme_ioctl.h>
itself and prints offsetof/sizeof and the ioctl numbers. Skipped (with the reason) on machines
without a C compiler or without the kernel headers; the layout tests in test_sgio.py and
test_nvme.py still run there.
"""

from __future__ import annotations

import ctypes
import shutil
import subprocess
from pathlib import Path

import pytest

from triage.capture import nvme, sgio

SG_FIELDS = [name for name, _ in sgio.SgIoHdr._fields_]
NVME_FIELDS = [name for name, _ in nvme.NvmePassthruCmd._fields_]

PROGRAM = """
#include <stddef.h>
#include <stdio.h>
#include <sys/ioctl.h>
#include <scsi/sg.h>
#include <linux/nvme_ioctl.h>
int main(void) {
%s
  printf("sizeof sg %%zu\\n", sizeof(struct sg_io_hdr));
  printf("sizeof nvme %%zu\\n", sizeof(struct nvme_passthru_cmd));
  printf("SG_IO %%lu\\n", (unsigned long)SG_IO);
  printf("SG_DXFER_FROM_DEV %%d\\n", SG_DXFER_FROM_DEV);
  printf("NVME_IOCTL_ADMIN_CMD %%lu\\n", (unsigned long)NVME_IOCTL_ADMIN_CMD);
  return 0;
}
"""


def compiled_facts(tmp_path: Path) -> dict[str, int]:
    compiler = shutil.which("cc") or shutil.which("gcc") or shutil.which("clang")
    if compiler is None:
        pytest.skip("no C compiler on this machine")
    if not Path("/usr/include/scsi/sg.h").exists() or not Path("/usr/include/linux/nvme_ioctl.h").exists():
        pytest.skip("kernel / libc headers <scsi/sg.h>, <linux/nvme_ioctl.h> not installed")
    lines = [f'  printf("sg {f} %zu\\n", offsetof(struct sg_io_hdr, {f}));' for f in SG_FIELDS]
    lines += [f'  printf("nvme {f} %zu\\n", offsetof(struct nvme_passthru_cmd, {f}));' for f in NVME_FIELDS]
    source = tmp_path / "layout.c"
    source.write_text(PROGRAM % "\n".join(lines))
    binary = tmp_path / "layout"
    subprocess.run([compiler, "-o", str(binary), str(source)], check=True, capture_output=True, timeout=60)
    output = subprocess.run([str(binary)], check=True, capture_output=True, text=True, timeout=10).stdout
    facts = {}
    for line in output.splitlines():
        *key, value = line.split()
        facts[" ".join(key)] = int(value)
    return facts


def test_ctypes_layouts_and_ioctl_numbers_equal_what_the_c_compiler_computes(tmp_path):
    facts = compiled_facts(tmp_path)
    for name in SG_FIELDS:
        assert getattr(sgio.SgIoHdr, name).offset == facts[f"sg {name}"], name
    for name in NVME_FIELDS:
        assert getattr(nvme.NvmePassthruCmd, name).offset == facts[f"nvme {name}"], name
    assert ctypes.sizeof(sgio.SgIoHdr) == facts["sizeof sg"]
    assert ctypes.sizeof(nvme.NvmePassthruCmd) == facts["sizeof nvme"]
    assert sgio.SG_IO == facts["SG_IO"]
    assert sgio.SG_DXFER_FROM_DEV == facts["SG_DXFER_FROM_DEV"]
    assert nvme.NVME_IOCTL_ADMIN_CMD == facts["NVME_IOCTL_ADMIN_CMD"]
