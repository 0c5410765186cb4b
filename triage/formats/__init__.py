"""Standard drive-health byte structures: pure functions bytes -> typed records, and back.

One module per structure, its standard section named in the module docstring:

- ``ata_identify``    ATA IDENTIFY DEVICE data (ACS-3)
- ``ata_smart``       SMART READ DATA (ACS-3; attribute table per SFF-8035i)
- ``ata_thresholds``  SMART READ THRESHOLDS (SFF-8035i)
- ``nvme_identify``   NVMe Identify Controller, CNS 01h (NVMe Base 2.0)
- ``nvme_health``     NVMe SMART / Health Information log page 02h (NVMe Base 2.0)

Each has ``parse_*`` (bytes -> frozen dataclass, ``LayoutError`` on bad layout), ``build_*``
(record -> bytes, for demo data and tests) and ``decode_*_batch`` (an (N, length) uint8 array ->
pandas DataFrame, vectorised for ingest, same answers as the parser). Strings from firmware are
cleaned by ``triage.formats.text``: padding stripped, non-printable bytes escaped as ``\\xNN``.
This layer imports nothing from the rest of ``triage``.
"""

from triage.formats.ata_identify import (
    AtaIdentify,
    build_ata_identify,
    decode_identify_batch,
    parse_ata_identify,
)
from triage.formats.ata_smart import (
    SmartAttribute,
    SmartData,
    build_smart_data,
    decode_smart_batch,
    parse_smart_data,
)
from triage.formats.ata_thresholds import (
    build_smart_thresholds,
    decode_thresholds_batch,
    parse_smart_thresholds,
)
from triage.formats.errors import LayoutError
from triage.formats.nvme_health import (
    NvmeHealth,
    build_nvme_health,
    critical_warning_names,
    decode_nvme_health_batch,
    parse_nvme_health,
)
from triage.formats.nvme_identify import (
    NvmeIdentify,
    build_nvme_identify,
    decode_nvme_identify_batch,
    parse_nvme_identify,
)
from triage.formats.text import clean_ascii, clean_ata_string

__all__ = [
    "AtaIdentify",
    "LayoutError",
    "NvmeHealth",
    "NvmeIdentify",
    "SmartAttribute",
    "SmartData",
    "build_ata_identify",
    "build_nvme_health",
    "build_nvme_identify",
    "build_smart_data",
    "build_smart_thresholds",
    "clean_ascii",
    "clean_ata_string",
    "critical_warning_names",
    "decode_identify_batch",
    "decode_nvme_health_batch",
    "decode_nvme_identify_batch",
    "decode_smart_batch",
    "decode_thresholds_batch",
    "parse_ata_identify",
    "parse_nvme_health",
    "parse_nvme_identify",
    "parse_smart_data",
    "parse_smart_thresholds",
]
