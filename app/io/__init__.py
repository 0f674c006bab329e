"""Readers: candidate files -> Volume.

Public surface: :func:`open_input` (a file, folder or zip -> groups of Volumes),
:class:`Volume`, :class:`Header`, :class:`Loaded`. One module per family:
:mod:`app.io.dicom`, :mod:`app.io.nifti`, :mod:`app.io.arrays`,
:mod:`app.io.hdf5`, :mod:`app.io.raster`, :mod:`app.io.archive`,
:mod:`app.io.folder`; :mod:`app.io.readers` lists them by family,
:mod:`app.io.formats` tells a file's family from its name, and
:mod:`app.io.inputs` opens a file, folder or archive. This module only
re-exports.
"""

from app.io.inputs import Loaded, open_input
from app.io.volume import Header, Volume

__all__ = ["Header", "Loaded", "Volume", "open_input"]
