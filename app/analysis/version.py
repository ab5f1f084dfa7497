"""The software version stored with every result."""

from __future__ import annotations

from importlib import metadata


def software_version() -> str:
    try:
        return metadata.version("plumbline")
    except metadata.PackageNotFoundError:
        return "0+unknown"
