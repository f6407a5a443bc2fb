"""Private Fourier helpers for the lattice estimate: windowed single-frequency transforms.

The lattice code needs the complex Fourier amplitude of an image at a few *arbitrary*
(non-grid) spatial frequencies, either over the whole frame or over a grid of overlapping
tiles. Because ``exp(-2 pi i (kx x + ky y))`` factorises into a row and a column term, a
windowed transform over a separable window is two matrix products::

    A[ty, tx] = sum_y sum_x  image[y, x] * u_ty(y) * v_tx(x)

with ``v_tx(x) = window_tx(x) * exp(-2 pi i kx x)`` (and likewise ``u``). The kernel along
the axis with the larger frequency component is made orthogonal to 1, x and x^2 on each tile,
so a background that is smooth across a tile (a constant, a gradient, a slow curvature) does
not leak into the amplitude. (One axis is enough: the product kernel is then orthogonal to
every such background; along an axis with almost no modulation the projection would remove
the window itself.)

Sign convention: ``A(k) = sum_r I(r) w(r) exp(-2 pi i k . r)``, the same as ``numpy.fft``.
Positions are pixel centres, x = column, y = row.
"""

from __future__ import annotations

import numpy as np

__all__ = ["tile_layout", "kernel_matrix", "tile_amplitudes"]


def tile_layout(length: int, tile: int) -> np.ndarray:
    """Start indices of half-overlapping tiles of ``tile`` pixels covering ``length`` pixels."""
    tile = int(min(tile, length))
    step = max(1, tile // 2)
    n = max(1, (length - tile) // step + 1)
    starts = np.arange(n) * step
    # centre the tile grid in the frame so both borders lose the same amount
    starts += (length - (starts[-1] + tile)) // 2
    return starts


def kernel_matrix(length: int, frequency: float, starts: np.ndarray, tile: int, *,
                  remove_background: bool = True) -> np.ndarray:
    """(length, n_tiles) complex matrix of windowed, background-free demodulation kernels.

    Parameters
    ----------
    length : int
        Pixels along this axis.
    frequency : float
        Spatial frequency along this axis, cycles per pixel.
    starts : (n_tiles,) ndarray of int
        First pixel of each tile.
    tile : int
        Tile length in pixels.
    remove_background : bool
        Project 1, x and x^2 out of every kernel vector.
    """
    tile = int(min(tile, length))
    out = np.zeros((length, starts.size), dtype=complex)
    # periodic Hann: overlapping tiles at half a tile step add up to a constant
    local = np.arange(tile)
    v = (0.5 - 0.5 * np.cos(2 * np.pi * (local + 0.5) / tile)) * np.exp(-2j * np.pi * frequency * local)
    if remove_background:
        # orthonormal basis of {1, x, x^2} on the tile; project the background out
        centred = local - (tile - 1) / 2.0
        q, _ = np.linalg.qr(np.stack([np.ones(tile), centred, centred * centred], axis=1))
        v = v - q @ (q.T @ v)
    # every tile sees the same kernel up to the phase of its first pixel
    for j, s in enumerate(starts):
        out[s:s + tile, j] = v * np.exp(-2j * np.pi * frequency * s)
    return out


def tile_amplitudes(image: np.ndarray, frequency, *, tile_rows: int, tile_cols: int,
                    row_starts: np.ndarray | None = None, col_starts: np.ndarray | None = None):
    """Complex amplitude of ``image`` at one spatial frequency, on every tile.

    Parameters
    ----------
    image : (H, W) ndarray
        Real image (any units).
    frequency : (2,) array_like
        ``(kx, ky)`` in cycles per pixel.
    tile_rows, tile_cols : int
        Tile size in pixels along y and x.

    Returns
    -------
    amplitudes : (n_ty, n_tx) complex ndarray
        Windowed Fourier amplitude of each tile (image units x pixels).
    centres : (2, n_ty, n_tx) ndarray
        ``(x, y)`` pixel coordinates of the tile centres.
    """
    height, width = image.shape
    kx, ky = float(frequency[0]), float(frequency[1])
    if col_starts is None:
        col_starts = tile_layout(width, tile_cols)
    if row_starts is None:
        row_starts = tile_layout(height, tile_rows)
    along_x = abs(kx) >= abs(ky)
    kx_mat = kernel_matrix(width, kx, col_starts, tile_cols, remove_background=along_x)
    ky_mat = kernel_matrix(height, ky, row_starts, tile_rows, remove_background=not along_x)
    # image is real: two real matrix products (contiguous operands, so BLAS is used) are
    # cheaper than one complex one
    part = image @ np.ascontiguousarray(kx_mat.real) + 1j * (image @ np.ascontiguousarray(kx_mat.imag))
    amplitudes = ky_mat.T @ part  # (n_ty, n_tx)
    cx = col_starts + (min(tile_cols, width) - 1) / 2.0
    cy = row_starts + (min(tile_rows, height) - 1) / 2.0
    centres = np.stack(np.meshgrid(cx, cy, indexing="xy"))
    return amplitudes, centres
