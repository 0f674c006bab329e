"""HDF5 reader via h5py: one dataset, read lazily.

The dataset is ``opts.dataset`` if given, else one named like k-space
(``kspace``, ``k_space``; domain k-space), else the largest numeric array with at
least two dimensions. An ISMRMRD file (a group with ``xml`` and ``data``) is read
by :mod:`app.io.ismrmrd`; an ``ismrmrd_header`` XML string beside the dataset
adds its encoding facts to the header fields. ``Volume.data`` is the h5py
Dataset itself (slicing reads only what is asked for); the file stays open in
``opts.stack`` until the caller's context manager exits.

References
----------
The HDF Group, HDF5 File Format Specification Version 3.0; h5py documentation
(``Dataset`` slicing reads from disk on demand).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np

from app.errors import InputError
from app.io import ismrmrd as ismrmrd_io
from app.io.options import (
    ReadOptions,
    array_axes,
    check_array_bytes,
    declared_bytes,
    is_complex_pairs,
    one_line,
)
from app.io.volume import Header, Volume


class CoilsBeforeImage:
    """A lazily read view of an h5py Dataset with its coil axis moved just before
    rows and cols (where :class:`app.io.volume.Volume` expects it); each
    indexing reads only the selected part from the file."""

    def __init__(self, dataset: Any, coil_axis: int) -> None:
        nd = len(dataset.shape)
        self._ds = dataset
        self._perm = [k for k in range(nd - 2) if k != coil_axis] + [coil_axis, nd - 2, nd - 1]
        self.shape = tuple(int(dataset.shape[k]) for k in self._perm)
        self.dtype = dataset.dtype
        self.ndim = nd

    def __getitem__(self, key: Any) -> np.ndarray:
        key = key if isinstance(key, tuple) else (key,)
        if any(k is Ellipsis for k in key):
            raise IndexError("Ellipsis is not supported")
        key = key + (slice(None),) * (self.ndim - len(key))
        orig: list[Any] = [slice(None)] * self.ndim
        for view_axis, k in enumerate(key):
            orig[self._perm[view_axis]] = k

        def dropped(k: Any) -> bool:
            return isinstance(k, int | np.integer)

        out = np.asarray(self._ds[tuple(orig)])
        kept_orig = [a for a in range(self.ndim) if not dropped(orig[a])]
        kept_view = [self._perm[v] for v in range(self.ndim) if not dropped(key[v])]
        return np.transpose(out, [kept_orig.index(a) for a in kept_view])

    def __array__(self, dtype: Any = None, copy: Any = None) -> np.ndarray:
        a = self[()]
        return a if dtype is None else a.astype(dtype)


class ComplexPairs:
    """A lazily read view of a real h5py Dataset whose last axis (size 2) holds real
    and imaginary parts, as complex values."""

    def __init__(self, dataset: Any) -> None:
        self._ds = dataset
        self.shape = tuple(int(s) for s in dataset.shape[:-1])
        self.dtype = np.dtype(np.complex64 if dataset.dtype.itemsize <= 4 else np.complex128)
        self.ndim = len(self.shape)

    def __getitem__(self, key: Any) -> np.ndarray:
        key = key if isinstance(key, tuple) else (key,)
        if any(k is Ellipsis for k in key):
            raise IndexError("Ellipsis is not supported")
        key = key + (slice(None),) * (self.ndim - len(key))
        pairs = np.asarray(self._ds[key + (slice(None),)])
        return (pairs[..., 0] + 1j * pairs[..., 1]).astype(self.dtype)

    def __array__(self, dtype: Any = None, copy: Any = None) -> np.ndarray:
        a = self[()]
        return a if dtype is None else a.astype(dtype)


class CheckedReads:
    """A lazily read h5py Dataset whose read errors (a damaged chunk, a failed
    filter) surface as :class:`InputError` naming the file, not as h5py's OSError."""

    def __init__(self, dataset: Any, path: Path) -> None:
        self._ds = dataset
        self._path = path
        self.shape = tuple(int(s) for s in dataset.shape)
        self.dtype = dataset.dtype
        self.ndim = len(self.shape)
        self.attrs = dataset.attrs

    @property
    def dataset(self) -> Any:
        """The h5py Dataset read from (lazily)."""
        return self._ds

    def __getitem__(self, key: Any) -> np.ndarray:
        try:
            return np.asarray(self._ds[key])
        except (OSError, RuntimeError, ValueError, KeyError) as exc:
            raise InputError("truncated", f"{self._path.name}: part of the dataset could not "
                             f"be read: {one_line(exc)}", str(self._path)) from exc

    def __array__(self, dtype: Any = None, copy: Any = None) -> np.ndarray:
        a = self[()]
        return a if dtype is None else a.astype(dtype)


def _datasets(f: Any) -> dict[str, Any]:
    import h5py

    found: dict[str, Any] = {}

    def visit(name: Any, obj: Any) -> None:
        if isinstance(obj, h5py.Dataset):
            # names that are not valid UTF-8 come back as bytes
            key = name.decode("utf-8", "replace") if isinstance(name, bytes) else str(name)
            found[key] = obj

    f.visititems(visit)
    return found


def _attributes(obj: Any, prefix: str, path: Path, opts: ReadOptions) -> dict[str, str]:
    """Up to 50 attributes of a file or dataset as text; damaged ones are left out."""
    try:
        return {f"{prefix}{k}": str(v)[:200] for k, v in list(obj.attrs.items())[:50]}
    except (OSError, RuntimeError, ValueError, KeyError, TypeError) as exc:
        opts.warnings.append(f"{path.name}: the attributes of {prefix.rstrip('.') or 'the file'} "
                             f"could not be read and were left out: {one_line(exc)}")
        return {}


def _usable(ds: Any) -> bool:
    try:
        dt = np.dtype(ds.dtype)
        shape = tuple(ds.shape)
    except (ValueError, TypeError, OSError, RuntimeError):
        return False  # a damaged datatype or dataspace message
    return len(shape) >= 2 and dt.fields is None and dt.kind in "biufc" and min(shape) > 0


def _ismrmrd_header_beside(all_ds: dict[str, Any], key: str, path: Path,
                           opts: ReadOptions) -> dict[str, Any]:
    """Encoding facts of an ``ismrmrd_header`` XML string dataset beside the analysed one.

    The layout public raw-data collections use: a ``kspace`` array with the
    ISMRMRD header as a string dataset in the same group.

    References
    ----------
    Inati et al., "ISMRM Raw data format", MRM 77(1):411-421, 2017.
    """
    parent = key.rsplit("/", 1)[0] + "/" if "/" in key else ""
    hdr = all_ds.get(parent + "ismrmrd_header")
    if hdr is None:
        return {}
    try:
        value = hdr[()]
        if isinstance(value, np.ndarray):
            value = value.ravel()[0] if value.size else b""
        fields = ismrmrd_io.header_fields(value if isinstance(value, bytes | str) else
                                          str(value))
    except Exception as exc:  # noqa: BLE001 - a damaged header is a warning, never a failure
        opts.warnings.append(f"{path.name}: the ismrmrd_header dataset could not be read: "
                             f"{one_line(exc)}")
        return {}
    fields["ismrmrd_header"] = True
    return fields


def _is_kspace_name(name: str) -> bool:
    leaf = name.rsplit("/", 1)[-1].lower().replace("-", "_")
    return leaf in ("kspace", "k_space", "ksp", "kdata") or "kspace" in leaf


def read_hdf5(path: Path, opts: ReadOptions) -> list[Volume]:
    """Open one dataset of an HDF5 file as a lazily read Volume.

    Raises
    ------
    InputError
        Not HDF5, no such dataset (the message lists those present), no numeric
        array of at least two dimensions, or compound (non-native complex) types.
    """
    import h5py

    try:
        f = h5py.File(path, "r")
    except (OSError, ValueError) as exc:
        raise InputError("unreadable", f"{path.name} is not a readable HDF5 file: {one_line(exc)}",
                         str(path)) from exc
    opts.stack.callback(f.close)
    group = ismrmrd_io.is_ismrmrd_file(f) if opts.dataset is None else None
    if group is not None:
        return ismrmrd_io.read_ismrmrd(path, opts, group=group)
    try:
        all_ds = _datasets(f)
    except (OSError, RuntimeError, ValueError, KeyError) as exc:
        raise InputError("unreadable", f"{path.name}: the HDF5 object tree could not be "
                         f"walked: {one_line(exc)}", str(path)) from exc
    if opts.dataset is not None:
        key = opts.dataset.strip("/")
        if key not in all_ds:
            listed = ", ".join(sorted(all_ds)[:20]) or "none"
            raise InputError("no_such_dataset", f"{path.name} has no dataset {opts.dataset!r}; "
                             f"datasets present: {listed}.", str(path))
        if not _usable(all_ds[key]):
            ds = all_ds[key]
            raise InputError("unsupported_dtype", f"{path.name}:{key} has shape "
                             f"{list(ds.shape)} and type {ds.dtype}; rawproof reads numeric "
                             "(real or complex) arrays of two or more dimensions.", str(path))
    else:
        usable = {k: d for k, d in all_ds.items() if _usable(d)}
        if not usable:
            raise InputError("empty", f"{path.name} holds no numeric array with two or more "
                             "dimensions (compound complex types are not supported).", str(path))
        named = [k for k in usable if _is_kspace_name(k)]
        if named:
            key = max(named, key=lambda k: usable[k].size)
        else:
            key = max(usable, key=lambda k: usable[k].size * usable[k].dtype.itemsize)
        others = sorted(set(usable) - {key})
        if others:
            opts.warnings.append(f"{path.name}: analysed the dataset {key!r}; also present: "
                                 f"{', '.join(others[:10])} (choose with --dataset).")
    ds = all_ds[key]
    check_array_bytes(declared_bytes(ds.shape, ds.dtype.itemsize), opts.limits, str(path),
                      f"{path.name}:{key}")
    domain = opts.domain or ("kspace" if _is_kspace_name(key) else "image")
    try:
        attr_cax = ds.attrs.get("coil_axis")
    except (OSError, RuntimeError, ValueError, KeyError, TypeError):
        attr_cax = None
    cax = opts.coil_axis if opts.coil_axis is not None else (
        int(attr_cax) if attr_cax is not None else None)
    if cax is None and domain == "kspace" and len(ds.shape) == 4:
        opts.warnings.append(f"{path.name}:{key} is 4D k-space with no coil axis given; if an "
                             "axis holds receive coils, say so with --coil-axis.")
    fields: dict[str, Any] = {"dataset": key, "bit_depth": ds.dtype.itemsize * 8}
    fields.update(_ismrmrd_header_beside(all_ds, key, path, opts))
    raw = _attributes(f, "", path, opts)
    raw.update(_attributes(ds, f"{key}.", path, opts))
    data: Any = CheckedReads(ds, path)
    nd = len(ds.shape)
    if is_complex_pairs(tuple(ds.shape), ds.dtype):
        if cax is not None and -nd <= cax < nd:
            cax = cax % nd
        data = ComplexPairs(data)
        nd -= 1
        fields["complex_from_last_axis"] = True
        opts.warnings.append(f"{path.name}:{key}: the last axis (size 2) was read as real and "
                             "imaginary parts of complex values.")
    if cax is not None and -nd <= cax < nd - 2 and cax % nd != nd - 3:
        data = CoilsBeforeImage(data, cax % nd)
        fields["coil_axis_in_file"] = cax % nd
        cax = nd - 3
    try:
        return [Volume(data=data, domain=domain, axes=array_axes(nd, cax),
                       format="hdf5", source_files=[str(path)], name=f"{path.stem}:{key}",
                       header=Header(fields=fields, raw=raw))]
    except ValueError as exc:
        raise InputError("bad_axes", f"{path.name}:{key}: {one_line(exc)}", str(path)) from exc
