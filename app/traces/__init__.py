"""Analysers: Volume -> Trace, each pure; the report assembles them.

Public surface: :func:`analyse_volume` (one Volume -> the contract report),
:class:`Trace` and :func:`register`. The plan of shared steps and analysers is
:mod:`app.traces.plan`; a file, folder or zip is analysed by
:func:`app.analysis.analyse_path`.
"""

from app.traces.base import Trace, register
from app.traces.report import analyse_volume

__all__ = ["Trace", "analyse_volume", "register"]
