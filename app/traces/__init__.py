"""Analysers: Volume -> Trace, each pure; the report assembles them.

Public surface: :func:`analyse_path`, :func:`analyse_volume`, :class:`Trace`,
:func:`register`.
"""

from app.traces.base import Trace, register
from app.traces.report import analyse_path, analyse_volume

__all__ = ["Trace", "analyse_path", "analyse_volume", "register"]
