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

import math
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


def _nearest(flat: NDArray, height: int, width: int, c: NDArray[np.float64], r: NDArray[np.float64],
             nodata: float | None) -> NDArray[np.float64]:
    """Value of the containing pixel, NaN outside the array or on nodata."""
    out = np.full(c.shape, np.nan)
    cf = np.floor(c)
    rf = np.floor(r)
    inside = (cf >= 0) & (cf < width) & (rf >= 0) & (rf < height)  # False for NaN
    idx = np.flatnonzero(inside)
    k = (rf[idx] * width + cf[idx]).astype(np.intp)
    val = np.take(flat, k, mode="wrap")  # k is in bounds: "wrap" only skips numpy's bounds check
    ok = _valid(val, nodata)
    out[idx[ok]] = val[ok]
    return out


def _bilinear_full(flat: NDArray, height: int, width: int, u: NDArray[np.float64], v: NDArray[np.float64],
                   nodata: float | None) -> NDArray[np.float64]:
    """Bilinear values where every point's 2x2 neighbourhood lies inside the array.

    ``u``/``v`` are pixel-centre coordinates (``col - 0.5``, ``row - 0.5``) and
    are overwritten (they become the fractional offsets). NaN where a
    neighbour is nodata or NaN. The four neighbours are gathered from shifted
    views of ``flat``, so one index array serves all four.
    """
    c0 = np.floor(u)
    r0 = np.floor(v)
    np.minimum(c0, width - 2, out=c0)  # on the last centre line: the last two columns, fx = 1
    np.minimum(r0, height - 2, out=r0)
    u -= c0  # fx, exact: u and floor(u) share an exponent range
    v -= r0  # fy
    r0 *= width
    r0 += c0
    k = r0.astype(np.intp)
    del c0, r0
    # k + width + 1 < flat.size for every point, so the shifted views never run short;
    # mode="wrap" only skips numpy's bounds check (no index wraps).
    a00 = np.take(flat, k, mode="wrap")
    a01 = np.take(flat[1:], k, mode="wrap")
    a10 = np.take(flat[width:], k, mode="wrap")
    a11 = np.take(flat[width + 1:], k, mode="wrap")
    del k
    check = nodata is not None and not np.isnan(nodata)
    if check:
        bad = a00 == nodata
        bad |= a01 == nodata
        bad |= a10 == nodata
        bad |= a11 == nodata
    # top = a00 + fx * (a01 - a00), bottom likewise, value = top + fy * (bottom - top), in float64
    top = np.subtract(a01, a00, dtype=np.float64)
    top *= u
    top += a00
    bottom = np.subtract(a11, a10, dtype=np.float64)
    bottom *= u
    bottom += a10
    bottom -= top
    bottom *= v
    bottom += top
    if check and bad.any():
        bottom[bad] = np.nan
    return bottom


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

    Bilinear arithmetic is float64 whatever the array's dtype; the result of a
    point depends only on its coordinates and the 2x2 pixels around it, not on
    the other points or on where ``array`` was cut from a larger raster.
    """
    if array.ndim != 2:
        raise ValueError("array must be 2-D")
    if method not in METHODS:
        raise ValueError(f"method must be one of {METHODS}, not {method!r}")
    height, width = array.shape
    flat = np.ravel(array)  # a view for C-contiguous arrays
    c = np.asarray(cols, dtype=np.float64)
    r = np.asarray(rows, dtype=np.float64)
    if method == "nearest" or c.size == 0 or height < 2 or width < 2:
        return _nearest(flat, height, width, c, r, nodata)

    u = c - 0.5
    v = r - 0.5
    # the 2x2 neighbourhood of (u, v) is inside when 0 <= u <= width - 1 (on the last centre line the
    # block is clamped to the last two columns, with weight 1 on the last), likewise for v
    lo_u, hi_u, lo_v, hi_v = u.min(), u.max(), v.min(), v.max()  # NaN propagates and fails the test
    if lo_u >= 0 and hi_u <= width - 1 and lo_v >= 0 and hi_v <= height - 1:
        out = _bilinear_full(flat, height, width, u, v, nodata)
        fallback = np.flatnonzero(np.isnan(out))
    else:
        out = np.full(c.shape, np.nan)
        full = (u >= 0) & (u <= width - 1) & (v >= 0) & (v <= height - 1)  # False for NaN
        sub = np.flatnonzero(full)
        out[sub] = _bilinear_full(flat, height, width, u[sub], v[sub], nodata)
        fallback = np.flatnonzero(np.isnan(out))
    if fallback.size:
        out[fallback] = _nearest(flat, height, width, c[fallback], r[fallback], nodata)
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


#: customers per window below which a window is cut down to the raster blocks that hold them.
_SPARSE_PX_PER_POINT = 4096


def plan_windows(
    rows: NDArray[np.integer],
    cols: NDArray[np.integer],
    shape: tuple[int, int],
    block: tuple[int, int],
    max_pixels: float,
) -> list[tuple[NDArray[np.intp], int, int, int, int]]:
    """Group points by the raster window to read for them.

    ``rows``/``cols`` are the integer pixels holding each point (all inside
    ``shape``). Returns ``(point indices, row0, row1, col0, col1)`` windows,
    half-open, each holding every pixel a point's bilinear neighbourhood
    needs (a one-pixel halo, clipped at the raster's edge), so sampling a
    window gives the same value as sampling the whole raster.

    * When the window covering all points holds at most ``max_pixels``, it is
      the only window.
    * Otherwise the raster is cut into cells of whole ``block``s (about 1024
      pixels a side, with their halo never more than ``max_pixels / 4``, nor
      smaller than one block; blocks are cut smaller when one block with its
      halo exceeds ``max_pixels``), points are sorted by
      cell, and each cell with points gives one window: the box around its
      points. A cell whose box holds more than 4096 pixels per point is cut
      further into one window per raster block that holds points. Every point
      is in exactly one window and each window is read once.
    """
    height, width = shape
    n = rows.size
    if n == 0:
        return []
    r = rows.astype(np.int64, copy=False)
    c = cols.astype(np.int64, copy=False)

    def box(idx: NDArray[np.intp] | None) -> tuple[int, int, int, int]:
        rr = r if idx is None else r[idx]
        cc = c if idx is None else c[idx]
        return (max(int(rr.min()) - 1, 0), min(int(rr.max()) + 2, height),
                max(int(cc.min()) - 1, 0), min(int(cc.max()) + 2, width))

    r0, r1, c0, c1 = box(None)
    if (r1 - r0) * (c1 - c0) <= max_pixels:
        return [(np.arange(n), r0, r1, c0, c1)]
    bh, bw = max(int(block[0]), 1), max(int(block[1]), 1)
    if (bh + 2) * (bw + 2) > max_pixels:  # a block with its halo must fit: use smaller squares
        bh = bw = max(int(math.sqrt(max_pixels)) - 2, 1)
    cell_h, cell_w = bh * max(1, 1024 // bh), bw * max(1, 1024 // bw)
    while (cell_h + 2) * (cell_w + 2) > max_pixels / 4 and (cell_h > bh or cell_w > bw):
        cell_h, cell_w = max(bh, cell_h // bh // 2 * bh), max(bw, cell_w // bw // 2 * bw)

    def groups(size_h: int, size_w: int, idx: NDArray[np.intp]):
        per_row = (width + size_w - 1) // size_w
        key = (r[idx] // size_h) * per_row + c[idx] // size_w
        order = np.argsort(key, kind="stable")
        key = key[order]
        starts = np.flatnonzero(np.r_[True, key[1:] != key[:-1]])
        ends = np.r_[starts[1:], key.size]
        return [idx[order[s:e]] for s, e in zip(starts, ends)]

    windows = []
    for members in groups(cell_h, cell_w, np.arange(n)):
        w = box(members)
        if (w[1] - w[0]) * (w[3] - w[2]) > _SPARSE_PX_PER_POINT * members.size and (cell_h > bh or cell_w > bw):
            windows.extend((m, *box(m)) for m in groups(bh, bw, members))
        else:
            windows.append((members, *w))
    return windows
