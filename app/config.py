"""Settings from the environment and command-line flags."""

from __future__ import annotations

import os
from dataclasses import dataclass, field, replace
from pathlib import Path


def _env_int(name: str, default: int) -> int:
    value = os.environ.get(name)
    return int(value) if value not in (None, "") else default


@dataclass(frozen=True)
class Limits:
    """Bounds on what an input may make rawproof read or allocate.

    Every reader checks declared sizes against these before allocating.
    """

    max_array_bytes: int = field(
        default_factory=lambda: _env_int("RAWPROOF_MAX_ARRAY_BYTES", 8 * 1024**3)
    )
    max_zip_members: int = field(
        default_factory=lambda: _env_int("RAWPROOF_MAX_ZIP_MEMBERS", 20000)
    )
    max_zip_total_bytes: int = field(
        default_factory=lambda: _env_int("RAWPROOF_MAX_ZIP_TOTAL_BYTES", 16 * 1024**3)
    )
    max_zip_member_bytes: int = field(
        default_factory=lambda: _env_int("RAWPROOF_MAX_ZIP_MEMBER_BYTES", 4 * 1024**3)
    )
    max_zip_ratio: float = field(
        default_factory=lambda: float(_env_int("RAWPROOF_MAX_ZIP_RATIO", 200))
    )
    max_files: int = field(default_factory=lambda: _env_int("RAWPROOF_MAX_FILES", 50000))
    max_image_pixels: int = field(
        default_factory=lambda: _env_int("RAWPROOF_MAX_IMAGE_PIXELS", 1 << 28)
    )
    #: address-space ceiling of one analysis process (RLIMIT_AS); 0 means none
    max_analysis_vm_bytes: int = field(
        default_factory=lambda: _env_int("RAWPROOF_MAX_ANALYSIS_VM_BYTES", 0)
    )

    def for_upload(self, max_upload_bytes: int) -> Limits:
        """These ceilings, lowered to what one upload of ``max_upload_bytes`` may need.

        A compressed input (npz, gzip, zip, HDF5 filters, compressed DICOM
        frames) may expand to an array of at most the upload limit, and an
        archive to at most :data:`ZIP_EXPANSION` times it on disk, so that a
        small upload cannot ask the analysis for gigabytes. The configured
        values stay the upper bound. The analysis process's address space is
        capped at the array ceiling plus a fixed allowance for the libraries
        (:data:`ANALYSIS_VM_BASE`) unless set.
        """
        u = max(1, int(max_upload_bytes))
        array = min(self.max_array_bytes, u)
        total = min(self.max_zip_total_bytes, ZIP_EXPANSION * u)
        vm = self.max_analysis_vm_bytes or (ANALYSIS_VM_BASE + 4 * array)
        return replace(self, max_array_bytes=array, max_zip_total_bytes=total,
                       max_zip_member_bytes=min(self.max_zip_member_bytes, total),
                       max_image_pixels=min(self.max_image_pixels, max(array, 1 << 20)),
                       max_analysis_vm_bytes=vm)


#: an uploaded archive may expand to this many times the upload limit on disk
ZIP_EXPANSION = 4
#: address space a spawned analysis process needs for Python, numpy, scipy, h5py,
#: pydicom and their thread pools before any input is read (measured: see README)
ANALYSIS_VM_BASE = 3 * 1024**3


@dataclass(frozen=True)
class Settings:
    """Server and worker settings.

    Attributes
    ----------
    data_dir : Path
        Holds the file store, the SQLite database (by default) and report caches.
    database_url : str
        Any SQLAlchemy URL; SQLite inside ``data_dir`` by default.
    max_upload_bytes : int
        Upper bound on one upload request, enforced while streaming.
    """

    data_dir: Path = field(
        default_factory=lambda: Path(os.environ.get("RAWPROOF_DATA", "rawproof-data")).resolve()
    )
    database_url: str = field(default_factory=lambda: os.environ.get("RAWPROOF_DATABASE_URL", ""))
    max_upload_bytes: int = field(
        default_factory=lambda: _env_int("RAWPROOF_MAX_UPLOAD_BYTES", 4 * 1024**3)
    )
    secure_cookies: bool = field(
        default_factory=lambda: os.environ.get("RAWPROOF_SECURE_COOKIES", "") == "1"
    )
    limits: Limits = field(default_factory=Limits)

    @property
    def analysis_limits(self) -> Limits:
        """The limits a job of this server runs under (see :meth:`Limits.for_upload`)."""
        return self.limits.for_upload(self.max_upload_bytes)

    @property
    def db_url(self) -> str:
        return self.database_url or f"sqlite:///{self.data_dir / 'rawproof.sqlite3'}"

    @property
    def store_dir(self) -> Path:
        return self.data_dir / "store"
