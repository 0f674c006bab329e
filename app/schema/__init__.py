"""The report contract's JSON Schema (``report.schema.json``)."""

from __future__ import annotations

import json
from functools import cache
from importlib import resources


@cache
def report_schema() -> dict:
    """The JSON Schema of ``rawproof.report/1`` reports and error objects."""
    return json.loads(resources.files(__package__).joinpath("report.schema.json").read_text())
