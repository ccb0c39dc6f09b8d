"""A posterior's NetCDF file: written atomically with checksums and a digest of the model
attributes, read back only from a regular file whose checksums and digest match, with row
labels kept in their kind. Nothing is pickled."""

from __future__ import annotations

import numpy as np
import xarray as xr

from ..core.errors import SpecificationError

__all__ = ["DIGEST", "attrs_digest", "write_tree", "read_tree", "encode_labels",
           "decode_labels"]

#: the root attribute holding the digest of the model attributes
DIGEST = "bayespanel_digest"


def attrs_digest(tree) -> str:
    """SHA-256 of the attributes that describe the model: the root's JSON texts and the
    sizes of the statistics (the arrays carry their own checksums)."""
    import hashlib

    h = hashlib.sha256()
    for k in sorted(a for a in tree.attrs if a.startswith("bayespanel_") and a != DIGEST):
        h.update(f"{k}\0{tree.attrs[k]}\0".encode())
    if "bayespanel_stats" in tree.children:
        st = tree["bayespanel_stats"].attrs
        for k in sorted(st):
            h.update(f"stats.{k}\0{st[k]}\0".encode())
    return h.hexdigest()


def write_tree(tree, path) -> None:
    """Write a posterior's DataTree: checksums on, made in memory, written atomically."""
    from ..core.outputs import write_atomic

    tree.attrs = {**tree.attrs, DIGEST: attrs_digest(tree)}
    encoding = {}
    for node in tree.subtree:
        enc = {name: {"fletcher32": True} for name, v in node.dataset.data_vars.items()
               if v.dtype.kind in "biuf" and v.ndim >= 1 and v.size > 0}
        if enc:
            encoding[node.path] = enc
    view = tree.to_netcdf(engine="h5netcdf", encoding=encoding)  # in memory, not a file
    try:
        data = bytes(view)
    finally:
        # a view kept alive (by the traceback of a failed write) would pin xarray's BytesIO,
        # and collecting the two in a cycle crashed the interpreter
        view.release()
    del view
    write_atomic(path, data)


def read_tree(path):
    """The DataTree of a saved posterior, or :class:`SpecificationError` naming the file.

    Only a regular file is opened; a bad checksum or attributes that do not match their
    digest (a flipped bit, an edited value) are refused.
    """
    from ..data.io import regular_file
    from ..core.outputs import settle_for

    settle_for(path)  # a run folder a killed run left mid-publish is finished first
    path = regular_file(path, "posterior file", SpecificationError)
    try:
        with xr.open_datatree(path, engine="h5netcdf") as tree:
            tree = tree.load()
    except Exception as exc:  # noqa: BLE001 - a damaged file fails anywhere in h5py/h5netcdf
        raise SpecificationError(
            f"{str(path)!r} is not a posterior file written by Posterior.save (NetCDF), or it "
            f"is damaged: {exc}") from None
    digest = tree.attrs.get(DIGEST)
    if digest is not None and digest != attrs_digest(tree):
        raise SpecificationError(f"{str(path)!r} is damaged or was edited: its model "
                                 "attributes do not match their SHA-256")
    return tree


def encode_labels(values):
    """``(array, kind)`` for writing row labels to NetCDF: numbers, booleans and datetimes
    as they are, anything else (strings, periods, mixed objects) as text."""
    v = np.asarray(values)
    if v.dtype.kind == "b":
        return v, "bool"
    if v.dtype.kind in "iu":
        return v.astype(np.int64), "int"
    if v.dtype.kind == "f":
        return v, "float"
    if v.dtype.kind == "M":
        return v.astype("datetime64[ns]"), "datetime"
    return np.array([str(x) for x in v], dtype=str), "str"


def decode_labels(da):
    """Row labels as :func:`encode_labels` wrote them, back in their kind."""
    kind = da.attrs.get("bayespanel_kind", "str")
    v = np.asarray(da.values)
    if kind == "str":
        return v.astype(str).astype(object)
    if kind == "datetime":
        return v.astype("datetime64[ns]")
    return v
