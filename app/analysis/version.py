"""The software version stored with every result."""

from __future__ import annotations

from functools import cache
from importlib import metadata


@cache
def software_version() -> str:
    """The installed package's version, read once per process (the lookup scans metadata)."""
    try:
        return metadata.version("plumbline")
    except metadata.PackageNotFoundError:
        return "0+unknown"
