"""A posterior's NetCDF file: the DataTree a posterior is written as and read back from
(:func:`posterior_tree`, :func:`posterior_parts`), written atomically with checksums and a
digest of the model attributes, read back only from a regular file whose checksums and
digest match, with row labels kept in their kind. Nothing is pickled."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import xarray as xr

from ..core import gaussian
from ..core.errors import SpecificationError
from ..core.suffstats import SuffStats
from .spec import ModelSpec

__all__ = ["DIGEST", "attrs_digest", "write_tree", "read_tree", "encode_labels",
           "decode_labels", "posterior_tree", "posterior_parts", "FORMAT_VERSION"]

#: the version of the file layout, in the root attribute ``bayespanel_format``
FORMAT_VERSION = 1
#: the fields of the sufficient statistics a file holds (group ``bayespanel_stats``)
_STATS_FIELDS = ("mean", "total", "within", "unit_count", "unit_mean", "lengths",
                 "group_count", "group_mean", "group_cp")

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


def posterior_tree(post, rows: bool) -> "xr.DataTree":
    """The DataTree :meth:`Posterior.save <bayespanel.bayes.posterior.Posterior.save>`
    writes: the sampler's groups, ``bayespanel_stats`` (sufficient statistics and unit
    labels), with ``rows`` the ``bayespanel_rows`` group (estimation rows, occasions, row
    labels), and the specification, sampling record, scaling and edits as JSON root
    attributes."""
    groups = {name: node.to_dataset() for name, node in post.idata.children.items()}
    st = post.stats
    p = st.p
    units = post.units
    unit_kind = "int" if pd.api.types.is_integer_dtype(units) else "str"
    unit_vals = units.to_numpy(dtype=np.int64) if unit_kind == "int" \
        else units.astype(str).to_numpy(dtype=str)
    groups["bayespanel_stats"] = xr.Dataset(
        {"mean": (("col",), st.mean), "total": (("col", "col2"), st.total),
         "within": (("col", "col2"), st.within),
         "unit_count": (("unit",), st.unit_count), "unit_mean": (("unit", "col"), st.unit_mean),
         "lengths": (("length",), st.lengths), "group_count": (("length",), st.group_count),
         "group_mean": (("length", "col"), st.group_mean),
         "group_cp": (("length", "col", "col2"), st.group_cp)},
        coords={"unit": unit_vals, "col": np.arange(p), "col2": np.arange(p)},
        attrs={"n": int(st.n), "n_units": int(st.n_units), "unit_kind": unit_kind})
    if rows and post.rows is not None:
        M, y, codes = post.rows
        data = {"M": (("row", "term"), np.asarray(M, float)),
                "y": (("row",), np.asarray(y, float)),
                "unit_code": (("row",), np.asarray(codes, np.int64))}
        for name, v in (("time", post.time), ("row_label", post.row_labels)):
            if v is not None:
                arr, kind = encode_labels(v)
                data[name] = (("row",), arr, {"bayespanel_kind": kind})
        if post.ar1_time is not None:
            data["ar1_time"] = (("row",), post.ar1_time)
        groups["bayespanel_rows"] = xr.Dataset(data)
    tree = xr.DataTree.from_dict({"/": xr.Dataset(attrs={
        "bayespanel_format": FORMAT_VERSION,
        "bayespanel_spec": post.spec.to_json(),
        "bayespanel_sampling": json.dumps(post.sampling),
        "bayespanel_scaling": json.dumps(post.scaling.to_dict() if post.scaling else None),
        **({"bayespanel_edits": json.dumps(post.edits)} if post.edits else {}),
    }), **groups})
    return tree


def posterior_parts(tree) -> tuple[dict, list]:
    """What a posterior is made from, read from the DataTree of :func:`posterior_tree`:
    the arguments of ``Posterior(...)`` (``idata``, ``spec``, ``stats``, ``units``,
    ``rows``, ``sampling``, ``scaling``, and ``time``, ``row_labels``, ``ar1_time`` where
    saved) and the names of the user's edits of the model."""
    attrs = tree.attrs
    spec = ModelSpec.from_json(attrs["bayespanel_spec"])
    sampling = json.loads(attrs["bayespanel_sampling"])
    sc = json.loads(attrs["bayespanel_scaling"])
    scaling = gaussian.Scaling.from_dict(sc) if sc else None
    sd = tree["bayespanel_stats"].to_dataset()
    stats = SuffStats(n=int(sd.attrs["n"]), n_units=int(sd.attrs["n_units"]),
                      **{f: np.asarray(sd[f].values) for f in _STATS_FIELDS})
    units = pd.Index(sd["unit"].values)
    if sd.attrs.get("unit_kind") == "str":
        units = pd.Index(units.astype(str), dtype=object)
    rows, labels = None, {}
    if "bayespanel_rows" in tree.children:
        rd = tree["bayespanel_rows"].to_dataset()
        rows = (np.asarray(rd["M"].values), np.asarray(rd["y"].values),
                np.asarray(rd["unit_code"].values))
        for name, key in (("time", "time"), ("row_label", "row_labels")):
            if name in rd:
                labels[key] = decode_labels(rd[name])
        if "ar1_time" in rd:
            labels["ar1_time"] = np.asarray(rd["ar1_time"].values, dtype=float)
    keep = {k: v.to_dataset() for k, v in tree.children.items()
            if not k.startswith("bayespanel_")}
    args = dict(idata=xr.DataTree.from_dict(keep), spec=spec, stats=stats, units=units,
                rows=rows, sampling=sampling, scaling=scaling, **labels)
    return args, list(json.loads(attrs.get("bayespanel_edits", "[]")))
