"""Sampling a DEM at points: pure numpy over arrays and an affine transform.

Pixel convention (GDAL, PixelIsArea): the geotransform's origin is the outer
corner of the top-left pixel, so pixel ``(row, col)`` covers fractional pixel
coordinates ``[col, col + 1) x [row, row + 1)`` and its centre is at
``(col + 0.5, row + 0.5)``.

Invariants (asserted by the tests):

* ``"nearest"`` returns the value of the pixel that contains the point
  (half-open on the right and bottom edges);
* ``"bilinear"`` interpolates between the four surrounding pixel centres and
  is exact for a planar surface ``z = a + b*x + c*y``; its value lies between
  the minimum and maximum of those four pixels;
* where a bilinear neighbour is nodata, or the point lies within half a pixel
  of the array's edge, the containing pixel's value is used instead;
* a point outside the array, or whose containing pixel is nodata, gets NaN.
  No made-up numbers.
"""

from __future__ import annotations

from typing import Literal

import numpy as np
from affine import Affine
from numpy.typing import ArrayLike, NDArray

Method = Literal["bilinear", "nearest"]
METHODS: tuple[str, ...] = ("bilinear", "nearest")


def pixel_coords(transform: Affine, xs: ArrayLike, ys: ArrayLike) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Fractional (col, row) pixel coordinates of map points under ``transform``."""
    inv = ~transform
    x = np.asarray(xs, dtype=np.float64)
    y = np.asarray(ys, dtype=np.float64)
    cols = inv.a * x + inv.b * y + inv.c
    rows = inv.d * x + inv.e * y + inv.f
    return cols, rows


def _valid(values: NDArray, nodata: float | None) -> NDArray[np.bool_]:
    ok = ~np.isnan(values) if values.dtype.kind == "f" else np.ones(values.shape, dtype=bool)
    if nodata is not None and not np.isnan(nodata):
        ok &= values != nodata
    return ok


def sample_pixels(
    array: NDArray,
    cols: ArrayLike,
    rows: ArrayLike,
    *,
    nodata: float | None = None,
    method: Method = "bilinear",
) -> NDArray[np.float64]:
    """Sample a 2-D ``array`` at fractional pixel coordinates.

    ``cols``/``rows`` are as returned by :func:`pixel_coords` (relative to the
    array's top-left corner). Returns float64 values, NaN where there is no
    value. ``nodata`` (and NaN, for float arrays) marks missing pixels.
    """
    if array.ndim != 2:
        raise ValueError("array must be 2-D")
    if method not in METHODS:
        raise ValueError(f"method must be one of {METHODS}, not {method!r}")
    height, width = array.shape
    flat = np.ravel(array)  # a view for C-contiguous arrays
    c = np.asarray(cols, dtype=np.float64)
    r = np.asarray(rows, dtype=np.float64)
    out = np.full(c.shape, np.nan)

    cf = np.floor(c)
    rf = np.floor(r)
    inside = (cf >= 0) & (cf < width) & (rf >= 0) & (rf < height)  # False for NaN
    idx_in = np.flatnonzero(inside)
    near_flat = rf[idx_in].astype(np.intp) * width + cf[idx_in].astype(np.intp)
    near_val = flat[near_flat]
    near_ok = _valid(near_val, nodata)
    out[idx_in[near_ok]] = near_val[near_ok]
    if method == "nearest" or idx_in.size == 0:
        return out

    u = c[idx_in] - 0.5
    v = r[idx_in] - 0.5
    # On the last centre line (u == width - 1) the 2x2 block is the last two columns with weight 1.
    c0 = np.minimum(np.floor(u), width - 2)
    r0 = np.minimum(np.floor(v), height - 2)
    full = (c0 >= 0) & (u <= width - 1) & (r0 >= 0) & (v <= height - 1)
    sub = np.flatnonzero(full)
    fx = u[sub] - c0[sub]
    fy = v[sub] - r0[sub]
    k = r0[sub].astype(np.intp) * width + c0[sub].astype(np.intp)
    a00 = flat[k].astype(np.float64)
    a01 = flat[k + 1].astype(np.float64)
    a10 = flat[k + width].astype(np.float64)
    a11 = flat[k + width + 1].astype(np.float64)
    good = _valid(a00, nodata) & _valid(a01, nodata) & _valid(a10, nodata) & _valid(a11, nodata)
    top = a00 + fx * (a01 - a00)
    bottom = a10 + fx * (a11 - a10)
    value = top + fy * (bottom - top)
    out[idx_in[sub[good]]] = value[good]
    return out


def sample(
    array: NDArray,
    transform: Affine,
    xs: ArrayLike,
    ys: ArrayLike,
    *,
    nodata: float | None = None,
    method: Method = "bilinear",
) -> NDArray[np.float64]:
    """Sample ``array`` georeferenced by ``transform`` at map points ``xs``, ``ys``."""
    cols, rows = pixel_coords(transform, xs, ys)
    return sample_pixels(array, cols, rows, nodata=nodata, method=method)
