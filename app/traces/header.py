"""Header provenance: what file headers declare about processing."""

from __future__ import annotations

from typing import Any

from app.io.volume import Volume


def provenance(volume: Volume) -> tuple[dict[str, Any], list[str]]:
    """Interpret a Volume's normalised header fields.

    Returns
    -------
    declared : dict
    notes : list of str
    """
    return {}, []
