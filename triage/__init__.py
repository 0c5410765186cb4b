"""triage: fleet drive-health triage from standard ATA SMART and NVMe health captures."""

__version__ = "0.1.0"
