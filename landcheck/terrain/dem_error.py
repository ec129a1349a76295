"""Seeded, spatially autocorrelated DEM error fields for Monte Carlo verdict confidence.

A DEM's elevations carry an error that is neither zero nor independent from
cell to cell.  The published way to carry that error into terrain derivatives
is Monte Carlo simulation: add many equally likely error fields to the DEM,
recompute slope each time, and report how often a cell or parcel crosses a
limit (Hunter & Goodchild 1997, *Geographical Analysis* 29(1); Fisher 1998,
*GeoInformatica* 2(3); Holmes, Chadwick & Kyriakidis 2000, *J. Hydrology* 233).
This module makes the error fields; the pipeline adds each one to a haloed DEM
window before the slope kernel (:func:`landcheck.terrain.slope.slope_gradient`).

Error model
-----------
Each field ``e`` is a stationary Gaussian random field with mean 0, marginal
standard deviation ``rmse_m`` and the *Gaussian* correlation function

    rho(d) = exp(-(d / L)**2),

where ``d`` is the horizontal distance in metres and ``L`` is the
**correlation length**, defined as the e-folding distance: ``rho(L) = 1/e``.
(A variogram's "practical range", where rho falls to 0.05, is ``sqrt(3) L``;
divide a fitted practical range by 1.732 to get ``L``.)  ``L = 0`` (or None)
means independent errors in every cell.

Independent errors are *not* the worst case for Horn's slope.  On flat ground
its false gradient follows ``var(p) = w^T C w`` (``w`` the kernel weights, ``C``
the error covariance of the 3 x 3 window): with this model it peaks near
``L = 1.35`` cells at about 1.27 times the independent value, falls back to it
near ``L = 2.7`` cells and shrinks toward 0 beyond.  (Zevenbergen-Thorne's,
``2 sigma^2 [1 - rho(2h)] / (4 h^2)``, only shrinks.)  When the error
structure is unknown, run a few lengths and keep the worst, as Hunter &
Goodchild (1997) recommend.

How a field is made
-------------------
1. **White noise on fixed global blocks.**  The plane of global cell indices
   (rows and columns, negative ones and ones past the raster edge included) is
   cut into fixed ``NOISE_BLOCK_CELLS`` x ``NOISE_BLOCK_CELLS`` blocks.  Block
   ``(i, j)`` of realization ``k`` is filled with standard normal numbers from a
   counter-based Philox generator (Salmon et al. 2011, "Parallel random
   numbers: as easy as 1, 2, 3", SC'11) whose key is derived from
   ``(seed, k)`` with :class:`numpy.random.SeedSequence` and whose counter
   holds ``(i, j)``.  Any window can therefore regenerate exactly the noise of
   the global cells it needs, in any order, in any process.
2. **Separable smoothing.**  The noise is convolved along columns and then
   along rows with a symmetric 1-D kernel of radius ``R`` cells, normalised to
   unit sum of squares, and scaled by ``rmse_m``.  The kernel is the spectral
   square root of the target lattice correlation ``exp(-(m h / L)**2)``, so the
   field's correlation at every integer cell lag matches rho within 1e-3
   (``R = ceil(4 s) + 2`` with ``s = L / (2 h)``; for ``L`` of two cells or
   more the kernel is the sampled Gaussian of standard deviation ``s`` cells
   to 1e-9).  Because rho factorises, ``rho(dx, dy) = rho(dx) rho(dy)``, the
   separable product is isotropic.
3. A window therefore needs a noise halo of ``R`` cells.  Every output cell is
   computed by the same arithmetic on the same noise values wherever the
   window lies, so a realization is **bit for bit identical** whether it is
   generated for the whole raster or window by window, serially, in threads or
   on Dask workers.

Reproducibility: a field is a function of (seed, realization index, the
model's numbers, global cell indices) only; the raster size plays no part.  It
is exact for a fixed NumPy version: NumPy keeps its bit generators stable but
does not promise that ``Generator.standard_normal`` returns the same stream in
every future release.  Record the NumPy version beside the seed.

Geographic grids
----------------
The kernel uses one east-west and one north-south cell size in metres for the
whole raster (:meth:`ErrorModel.for_grid` takes them at the centre row).  On a
geographic (degree) grid the true east-west cell size varies with ``cos(lat)``
across the rows, so the east-west correlation length in metres is exact at the
centre row and off by the ratio ``cos(lat) / cos(lat_centre)`` elsewhere
(about 0.5 % at the top and bottom of a one-degree-tall raster at 30 degrees).
The marginal standard deviation is exact everywhere.
"""

from __future__ import annotations

import math
import numbers
from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage

from landcheck.errors import RuleFileError
from landcheck.geo.grid import GridSpec, Window

__all__ = [
    "ErrorModel",
    "check_realizations",
    "error_field",
    "error_field_with_halo",
    "probability_standard_error",
    "NOISE_BLOCK_CELLS",
    "MIN_REALIZATIONS",
    "MAX_REALIZATIONS",
    "MAX_KERNEL_SIGMA_CELLS",
]

#: side of the fixed global noise blocks in cells.  Part of the reproducibility
#: contract: changing it changes every field.
NOISE_BLOCK_CELLS = 128

#: fewest realizations accepted: below this the Monte Carlo standard error of a
#: probability, sqrt(P (1 - P) / N), exceeds 0.15 near P = 0.5 (common practice)
MIN_REALIZATIONS = 10
#: most realizations accepted: past this the standard error (< 0.005) no longer
#: justifies the run time (common practice)
MAX_REALIZATIONS = 10_000

#: largest kernel standard deviation in cells (kernel radius about 4x this);
#: past it a field costs too much per realization
MAX_KERNEL_SIGMA_CELLS = 250.0

#: kernel radius in kernel standard deviations, plus a fixed margin in cells
#: that keeps the correlation error under 1e-3 for the shortest lengths
_KERNEL_TRUNCATE_SIGMAS = 4.0
_KERNEL_MARGIN_CELLS = 2

#: arbitrary constant mixed into every key, so that a seed shared with some
#: other random use in the project never yields the same numbers as here
_STREAM_TAG = 0x4C43_0001


def _as_positive_float(value, name: str, what: str) -> float:
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise RuleFileError(f"DEM error model: {name} = {value!r}; expected a number ({what}).")
    v = float(value)
    if not math.isfinite(v) or v <= 0.0:
        raise RuleFileError(f"DEM error model: {name} = {value!r}; expected a finite number greater than 0 ({what}).")
    return v


@dataclass(frozen=True)
class ErrorModel:
    """Vertical error of a DEM as a stationary Gaussian random field.

    Parameters
    ----------
    rmse_m : float
        Marginal standard deviation of the error in metres (the DEM's vertical
        RMSE, taken as unbiased).  Must be > 0.
    corr_length_m : float or None
        Correlation length ``L`` in metres: the e-folding distance of the
        Gaussian correlation function ``rho(d) = exp(-(d/L)**2)``.  0 or None
        means independent errors in every cell.  Otherwise it must be at least
        one cell (the larger of the two cell sizes).
    cell_size_m : float
        East-west cell size in metres (> 0).
    cell_size_y_m : float, optional
        North-south cell size in metres; defaults to ``cell_size_m``.

    Raises
    ------
    RuleFileError
        For a non-positive or non-finite RMSE or cell size, a correlation length
        shorter than one cell, or one so long that the kernel would exceed
        ``MAX_KERNEL_SIGMA_CELLS``.  ``RuleFileError`` is also a ``ValueError``.

    Examples
    --------
    >>> m = ErrorModel(rmse_m=2.0, corr_length_m=40.0, cell_size_m=10.0)
    >>> m.kernel_sigma_cells
    (2.0, 2.0)
    >>> m.halo_cells
    10
    >>> ErrorModel(rmse_m=2.0, corr_length_m=None, cell_size_m=10.0).halo_cells
    0
    """

    rmse_m: float
    corr_length_m: float | None
    cell_size_m: float
    cell_size_y_m: float | None = None
    _kernel_y: np.ndarray = field(init=False, repr=False, compare=False)
    _kernel_x: np.ndarray = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        rmse = _as_positive_float(self.rmse_m, "rmse_m", "the DEM's vertical RMSE in metres, e.g. 5.0")
        hx = _as_positive_float(self.cell_size_m, "cell_size_m", "the east-west cell size in metres")
        hy = (
            hx
            if self.cell_size_y_m is None
            else _as_positive_float(self.cell_size_y_m, "cell_size_y_m", "the north-south cell size in metres")
        )
        length = self.corr_length_m
        if length is None:
            length = 0.0
        if isinstance(length, bool) or not isinstance(length, numbers.Real) or not math.isfinite(float(length)):
            raise RuleFileError(
                f"DEM error model: corr_length_m = {self.corr_length_m!r}; expected a finite distance in metres, "
                "or 0 for independent errors per cell."
            )
        length = float(length)
        if length < 0.0:
            raise RuleFileError(
                f"DEM error model: corr_length_m = {length:g} m is negative; give a distance in metres, "
                "or 0 for independent errors per cell."
            )
        cell = max(hx, hy)
        if 0.0 < length < cell:
            raise RuleFileError(
                f"DEM error model: corr_length_m = {length:g} m is shorter than one cell ({cell:g} m); "
                f"give 0 for independent errors per cell, or a length of at least {cell:g} m."
            )
        sigma_max = length / (2.0 * min(hx, hy))
        if sigma_max > MAX_KERNEL_SIGMA_CELLS:
            limit_m = 2.0 * MAX_KERNEL_SIGMA_CELLS * min(hx, hy)
            raise RuleFileError(
                f"DEM error model: corr_length_m = {length:g} m spans {length / min(hx, hy):.0f} cells, too long "
                f"to simulate; use at most {limit_m:g} m. At such lengths a shorter one gives a larger (more "
                "cautious) slope error, so the smaller value errs on the safe side."
            )
        object.__setattr__(self, "rmse_m", rmse)
        object.__setattr__(self, "corr_length_m", length)
        object.__setattr__(self, "cell_size_m", hx)
        object.__setattr__(self, "cell_size_y_m", hy)
        # The kernels are built once here and travel with the object when it is
        # pickled to a worker, so every worker uses the very same weights.
        object.__setattr__(self, "_kernel_y", _smoothing_kernel(length / (2.0 * hy)) if length else _IDENTITY)
        object.__setattr__(self, "_kernel_x", _smoothing_kernel(length / (2.0 * hx)) if length else _IDENTITY)

    @classmethod
    def for_grid(cls, rmse_m: float, corr_length_m: float | None, grid: GridSpec) -> ErrorModel:
        """Model for ``grid`` with the cell sizes of its centre row (see the module notes on geographic grids)."""
        hx, hy = grid.cell_size_m(np.array([grid.height // 2]))
        return cls(rmse_m, corr_length_m, float(hx[0]), float(hy[0]))

    @property
    def independent(self) -> bool:
        """True when errors are independent from cell to cell (correlation length 0)."""
        return self.corr_length_m == 0.0

    @property
    def kernel_sigma_cells(self) -> tuple[float, float]:
        """(north-south, east-west) standard deviation of the Gaussian kernel in cells, ``L / (2 h)``."""
        if self.independent:
            return (0.0, 0.0)
        return (self.corr_length_m / (2.0 * self.cell_size_y_m), self.corr_length_m / (2.0 * self.cell_size_m))

    @property
    def kernel_radius_cells(self) -> tuple[int, int]:
        """(north-south, east-west) kernel radius in cells; 0 for independent errors."""
        return ((self._kernel_y.size - 1) // 2, (self._kernel_x.size - 1) // 2)

    @property
    def halo_cells(self) -> int:
        """Cells of noise a window needs beyond its edge on every side (the larger kernel radius)."""
        return max(self.kernel_radius_cells)

    def correlation(self, dx_m, dy_m=0.0):
        """Nominal correlation ``exp(-(dx**2 + dy**2) / L**2)`` at offsets in metres (1 at 0, 0 elsewhere if independent)."""
        d2 = np.asarray(dx_m, dtype=np.float64) ** 2 + np.asarray(dy_m, dtype=np.float64) ** 2
        if self.independent:
            return np.where(d2 == 0.0, 1.0, 0.0)
        return np.exp(-d2 / self.corr_length_m**2)

    def lattice_correlation(self, lag_rows: int, lag_cols: int) -> float:
        """Correlation the generated field actually has at a lag of whole cells (within 1e-3 of :meth:`correlation`)."""
        return _kernel_autocorrelation(self._kernel_y, lag_rows) * _kernel_autocorrelation(self._kernel_x, lag_cols)


_IDENTITY = np.ones(1, dtype=np.float64)


def _smoothing_kernel(sigma_cells: float) -> np.ndarray:
    """Symmetric 1-D kernel whose autocorrelation is ``exp(-m**2 / (4 sigma**2))`` at integer lags ``m``.

    Spectral square root: the discrete-time Fourier transform of the target
    correlation sequence is positive (it samples a positive definite function),
    so its square root is the transform of a real, even kernel whose
    autocorrelation is the target.  Evaluated on a long FFT, truncated at
    ``ceil(4 sigma) + 2`` cells and renormalised to unit sum of squares.
    """
    radius = int(math.ceil(_KERNEL_TRUNCATE_SIGMAS * sigma_cells)) + _KERNEL_MARGIN_CELLS
    n = 1 << int(math.ceil(math.log2(max(256, 32 * (radius + 1)))))
    m = np.arange(n, dtype=np.float64)
    m = np.minimum(m, n - m)
    target = np.exp(-((m / (2.0 * sigma_cells)) ** 2))
    spectrum = np.clip(np.fft.rfft(target).real, 0.0, None)
    half = np.fft.irfft(np.sqrt(spectrum), n)[: radius + 1]
    kernel = np.concatenate([half[:0:-1], half])  # exactly symmetric by construction
    return kernel / math.sqrt(float(np.sum(kernel * kernel)))


def _kernel_autocorrelation(kernel: np.ndarray, lag: int) -> float:
    lag = abs(int(lag))
    if lag >= kernel.size:
        return 0.0
    return float(np.dot(kernel[: kernel.size - lag], kernel[lag:]))


def check_realizations(n) -> int:
    """Validate a number of Monte Carlo realizations and return it as an int.

    Parameters
    ----------
    n : int
        Realizations per run; must be a whole number from ``MIN_REALIZATIONS``
        (10) to ``MAX_REALIZATIONS`` (10 000).  The Monte Carlo standard error
        of an estimated probability is ``sqrt(P (1 - P) / N)``: 0.16 at N = 10,
        0.05 at N = 100 and 0.005 at N = 10 000 for P = 0.5.

    Raises
    ------
    RuleFileError
        For a non-integer, or a count outside the limits.

    Examples
    --------
    >>> check_realizations(200)
    200
    """
    if isinstance(n, bool) or not isinstance(n, numbers.Integral):
        if isinstance(n, numbers.Real) and not isinstance(n, bool) and float(n).is_integer():
            n = int(float(n))
        else:
            raise RuleFileError(
                f"realizations = {n!r}; expected a whole number from {MIN_REALIZATIONS} to {MAX_REALIZATIONS}."
            )
    n = int(n)
    if n < MIN_REALIZATIONS:
        raise RuleFileError(
            f"realizations = {n} is too few to estimate a probability (standard error up to "
            f"{0.5 / math.sqrt(max(n, 1)):.2f}); use at least {MIN_REALIZATIONS}, typically 100 to 500."
        )
    if n > MAX_REALIZATIONS:
        raise RuleFileError(
            f"realizations = {n} is more than the limit of {MAX_REALIZATIONS}; the standard error is already below "
            f"{0.5 / math.sqrt(MAX_REALIZATIONS):.3f} there. Use at most {MAX_REALIZATIONS}."
        )
    return n


def probability_standard_error(p, n: int):
    """Monte Carlo (binomial) standard error ``sqrt(P (1 - P) / N)`` of a probability estimated from N realizations."""
    p = np.asarray(p, dtype=np.float64)
    return np.sqrt(p * (1.0 - p) / float(n))


def _check_count(value, name: str) -> int:
    if isinstance(value, bool) or not isinstance(value, numbers.Integral) or int(value) < 0:
        raise RuleFileError(f"{name} = {value!r}; expected a whole number >= 0.")
    return int(value)


def _realization_key(seed: int, realization: int) -> np.ndarray:
    """Philox key (two 64-bit words) for one realization of one seed."""
    seq = np.random.SeedSequence(entropy=seed, spawn_key=(_STREAM_TAG, realization))
    return seq.generate_state(2, dtype=np.uint64)


def _zigzag(i: int) -> int:
    """Map any integer to a distinct non-negative one (0, -1, 1, -2, ... -> 0, 1, 2, 3, ...)."""
    return 2 * i if i >= 0 else -2 * i - 1


def _noise_block(key: np.ndarray, block_row: int, block_col: int) -> np.ndarray:
    """Standard normal noise of one global block; the Philox counter starts at (0, 0, row, col)."""
    counter = np.array([0, 0, _zigzag(block_row), _zigzag(block_col)], dtype=np.uint64)
    gen = np.random.Generator(np.random.Philox(key=key, counter=counter))
    return gen.standard_normal((NOISE_BLOCK_CELLS, NOISE_BLOCK_CELLS))


def _white_noise(key: np.ndarray, row0: int, col0: int, height: int, width: int) -> np.ndarray:
    """Standard normal noise of global cells ``row0 .. row0+height``, ``col0 .. col0+width`` (may be negative)."""
    b = NOISE_BLOCK_CELLS
    out = np.empty((height, width), dtype=np.float64)
    for br in range(row0 // b, (row0 + height - 1) // b + 1):
        r_lo, r_hi = max(row0, br * b), min(row0 + height, (br + 1) * b)
        for bc in range(col0 // b, (col0 + width - 1) // b + 1):
            c_lo, c_hi = max(col0, bc * b), min(col0 + width, (bc + 1) * b)
            block = _noise_block(key, br, bc)
            out[r_lo - row0 : r_hi - row0, c_lo - col0 : c_hi - col0] = block[
                r_lo - br * b : r_hi - br * b, c_lo - bc * b : c_hi - bc * b
            ]
    return out


def _field(model: ErrorModel, key: np.ndarray, row0: int, col0: int, height: int, width: int) -> np.ndarray:
    """Error field in metres on global cells ``row0 .. row0+height``, ``col0 .. col0+width``."""
    ry, rx = model.kernel_radius_cells
    noise = _white_noise(key, row0 - ry, col0 - rx, height + 2 * ry, width + 2 * rx)
    if ry:
        # every kept output reads only real noise (the boundary mode never matters)
        noise = ndimage.convolve1d(noise, model._kernel_y, axis=0, mode="constant")[ry : ry + height]
    if rx:
        noise = ndimage.convolve1d(noise, model._kernel_x, axis=1, mode="constant")[:, rx : rx + width]
    noise *= model.rmse_m
    return noise


def _check_window(window: Window, grid_height: int, grid_width: int) -> None:
    if not isinstance(window, Window):
        raise TypeError(f"window must be a landcheck.geo.grid.Window, got {type(window).__name__}")
    if (
        window.height < 1
        or window.width < 1
        or window.row_off < 0
        or window.col_off < 0
        or window.row_off + window.height > grid_height
        or window.col_off + window.width > grid_width
    ):
        raise ValueError(f"{window} is empty or not inside the {grid_height} x {grid_width} raster")


def error_field(
    model: ErrorModel,
    window: Window,
    grid_height: int,
    grid_width: int,
    seed: int,
    realization: int,
) -> np.ndarray:
    """One realization of the DEM error field on ``window``.

    Parameters
    ----------
    model : ErrorModel
        RMSE, correlation length and cell size.
    window : landcheck.geo.grid.Window
        Cells to fill, in global raster indices; must lie inside the raster.
    grid_height, grid_width : int
        Raster size in cells (only used to check ``window``; the field itself
        does not depend on the raster size).
    seed : int
        Run seed, a whole number >= 0.
    realization : int
        Realization index, a whole number >= 0.

    Returns
    -------
    ndarray, float64, shape (window.height, window.width)
        Elevation error in metres, no NaN.  Identical bit for bit to the same
        cells of the field generated for any other window that contains them.

    Raises
    ------
    RuleFileError
        If ``seed`` or ``realization`` is not a whole number >= 0.

    Examples
    --------
    >>> m = ErrorModel(rmse_m=2.0, corr_length_m=40.0, cell_size_m=10.0)
    >>> whole = error_field(m, Window(0, 0, 30, 30), 30, 30, seed=7, realization=0)
    >>> part = error_field(m, Window(10, 20, 5, 10), 30, 30, seed=7, realization=0)
    >>> bool((part == whole[10:15, 20:30]).all())
    True
    """
    _check_window(window, grid_height, grid_width)
    key = _realization_key(_check_count(seed, "seed"), _check_count(realization, "realization"))
    return _field(model, key, window.row_off, window.col_off, window.height, window.width)


def error_field_with_halo(
    model: ErrorModel,
    window: Window,
    halo: int,
    grid_height: int,
    grid_width: int,
    seed: int,
    realization: int,
) -> np.ndarray:
    """One realization of the error field on ``window`` grown by ``halo`` cells on every side.

    The result lines up cell for cell with
    :meth:`landcheck.inputs.dem.DemSource.read_with_halo` ``(window, halo)``, so the
    caller can add it to the haloed DEM window before the slope kernel.  Cells
    of the halo outside the raster get error values too (no NaN); the DEM is NaN
    there, so the sum stays NaN.

    Parameters
    ----------
    model, window, grid_height, grid_width, seed, realization
        As for :func:`error_field`; ``window`` must lie inside the raster.
    halo : int
        Cells added on every side (``landcheck.terrain.slope.HALO_CELLS`` for slope).

    Returns
    -------
    ndarray, float64, shape (window.height + 2 halo, window.width + 2 halo)
        Elevation error in metres.
    """
    _check_window(window, grid_height, grid_width)
    if isinstance(halo, bool) or not isinstance(halo, numbers.Integral) or halo < 0:
        raise ValueError(f"halo must be a whole number of cells >= 0, got {halo!r}")
    key = _realization_key(_check_count(seed, "seed"), _check_count(realization, "realization"))
    h = int(halo)
    return _field(model, key, window.row_off - h, window.col_off - h, window.height + 2 * h, window.width + 2 * h)
