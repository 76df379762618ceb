"""One habitat- and climate-gated colonisation step of a dispersal kernel model on a grid (FFT convolution)."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import scipy.fft

from envelope.errors import InputError
from envelope.kernels.rowblocks import row_blocks

__all__ = ["SpreadOperator", "DEFAULT_PRESSURE_FLOOR"]

# Pressure below which an FFT convolution result is treated as exactly 0, by dtype.
# float64: the round-off of an rfft2/irfft2 convolution of inputs in [0, 1] with a kernel
# summing to 1 is ~1e-16 relative to the largest pressure (measured up to 4000 x 4000 grids:
# < 1e-15, see docs/dispersal.md); 1e-12 leaves a 1000x margin yet lies far below the
# smallest pressure that matters (tail tolerance 1e-6 x occupancy 1e-3 = 1e-9, and with
# rate R = 10 a pressure of 1e-12 colonises with probability 1e-11).
# float32: round-off is ~1e-7, so the floor must be 1e-5 -- at the level of the kernel's
# tail weights, hence float32 shortens the reach of the far tail (see docs).
DEFAULT_PRESSURE_FLOOR = {np.dtype(np.float64): 1e-12, np.dtype(np.float32): 1e-5}



class _Block:
    """One convolution: kernel transform and the rows it reads and writes."""

    __slots__ = ("out_rows", "in_rows", "kernel_hat", "padded", "crop")

    def __init__(self, out_rows, in_rows, kernel_hat, padded, crop):
        self.out_rows, self.in_rows, self.kernel_hat = out_rows, in_rows, kernel_hat
        self.padded, self.crop = padded, crop


def _as_kernel(kernel, name):
    k = np.asarray(kernel, dtype=np.float64)
    if k.ndim != 2 or k.shape[0] % 2 != 1 or k.shape[1] % 2 != 1:
        raise InputError(f"{name} must be a 2-D array with odd sides (source at the centre), got shape {k.shape}")
    if not np.all(np.isfinite(k)) or np.any(k < 0):
        raise InputError(f"{name} must hold finite weights >= 0")
    return k


class SpreadOperator:
    """Propagule pressure and one colonisation/extinction step on a fixed grid.

    The operator is built once for a grid shape and a discretised kernel; it precomputes the
    kernel's real FFT on a zero-padded shape (``scipy.fft.next_fast_len``) so each step costs
    one forward and one inverse FFT. The padding (grid plus one kernel half-width per axis,
    enough for the cropped output to be free of wrap-around) makes the convolution linear on
    the grid, not circular: propagules leaving the domain are lost (absorbing edge). With
    ``periodic_x`` the convolution is circular in x (period = the grid's width) and linear in y.

    Model (per step t -> t+1; see docs/dispersal.md):

    - pressure pi = p_t (*) k, set to 0 below ``pressure_floor``;
    - colonisation of an empty cell: c = 1 - exp(-R * pi * h * s);
    - persistence of an occupied cell: phi = s once it has been unsuitable (s < 1) for more
      than ``persistence_lag`` consecutive steps, else 1;
    - deterministic (expected occupancy): p_{t+1} = p_t * phi + (1 - p_t) * c;
    - stochastic: independent Bernoulli draws, occupied cells kept with probability phi,
      empty cells colonised with probability c.

    Parameters
    ----------
    grid_shape : tuple of int
        (ny, nx) of the grid.
    kernel : ndarray or list of (int, int, ndarray)
        A discretised kernel (odd x odd, source at the centre), or latitude bands
        ``(row_start, row_stop, kernel)`` covering all rows (from
        :func:`envelope.kernels.dispersal.latitude_band_kernels`). For a band, the pressure on
        its rows is computed with its kernel from the slab of rows it can reach (band rows
        plus the kernel half-height on each side), so the cost is about one grid-sized FFT
        plus the overlaps rather than one per band.
    dtype : {numpy.float64, numpy.float32}, default=numpy.float64
        FFT precision. float32 is about twice as fast but its floor (1e-5) cuts the far tail.
    pressure_floor : float, optional
        Pressures below this are set to 0 (this also clips the negative FFT round-off).
        Default :data:`DEFAULT_PRESSURE_FLOOR` for the dtype. 0 disables the cut (negative
        values are still clipped).
    workers : int, default=2
        Threads for scipy.fft.
    periodic_x : bool, default=False
        The x axis is periodic (a geographic grid that circles the globe): propagules leaving
        the east edge arrive at the west edge and vice versa. The y axis stays absorbing.

    References
    ----------
    Kot, M., Lewis, M.A. & van den Driessche, P. (1996) Dispersal data and the spread of
    invading organisms. Ecology 77: 2027-2042 (integrodifference models).
    Hanski, I. (1994) A practical model of metapopulation dynamics. J. Anim. Ecol. 63:
    151-162 (colonisation probability 1 - exp(-connectivity)).

    Examples
    --------
    >>> import numpy as np
    >>> from envelope.kernels.dispersal import discretise_kernel
    >>> k = discretise_kernel("exponential", 2.0, cell_dx_km=1.0, cell_dy_km=1.0)
    >>> op = SpreadOperator((50, 50), k)
    >>> p = np.zeros((50, 50)); p[25, 25] = 1.0
    >>> ones = np.ones((50, 50))
    >>> q = op.step(p, ones, ones, rate=2.0)
    >>> bool(q[25, 26] > 0), bool(q[0, 0] == 0)
    (True, True)
    """

    def __init__(self, grid_shape, kernel, *, dtype=np.float64, pressure_floor=None, workers=2, periodic_x=False):
        ny, nx = (int(v) for v in grid_shape)
        if ny < 1 or nx < 1:
            raise InputError(f"grid_shape must be two positive sizes, got {grid_shape!r}")
        self.shape = (ny, nx)
        self.dtype = np.dtype(dtype)
        if self.dtype not in DEFAULT_PRESSURE_FLOOR:
            raise InputError(f"dtype must be float64 or float32, got {self.dtype}")
        floor = DEFAULT_PRESSURE_FLOOR[self.dtype] if pressure_floor is None else float(pressure_floor)
        if not (floor >= 0 and np.isfinite(floor)):
            raise InputError(f"pressure_floor must be >= 0, got {pressure_floor!r}")
        self.pressure_floor = floor
        self.workers = int(workers)
        self.periodic_x = bool(periodic_x)
        if isinstance(kernel, np.ndarray) or not isinstance(kernel, Sequence):
            bands = [(0, ny, _as_kernel(kernel, "kernel"))]
        else:
            bands = [(int(r0), int(r1), _as_kernel(k, f"kernel of band {r0}:{r1}")) for r0, r1, k in kernel]
            expected = 0
            for r0, r1, _ in bands:
                if r0 != expected or r1 <= r0:
                    raise InputError(f"latitude bands must cover rows 0..{ny} contiguously; band {r0}:{r1} "
                                     f"found where row {expected} was expected")
                expected = r1
            if expected != ny:
                raise InputError(f"latitude bands end at row {expected}, but the grid has {ny} rows")
        self.blocks = [self._plan(r0, r1, k) for r0, r1, k in bands]

    def _plan(self, r0, r1, k):
        ny, nx = self.shape
        hy, hx = k.shape[0] // 2, k.shape[1] // 2
        i0, i1 = max(0, r0 - hy), min(ny, r1 + hy)  # rows that can send propagules to the band
        # A circular convolution of period P equals the linear one on the cropped output
        # (full indices h .. h + n - 1) when P >= n + h: the wrapped-around part of the full
        # result (indices n + h .. n + 2h - 1 and below h) then lands outside the crop. The
        # kernel itself must fit: P >= 2h + 1. For a kernel as large as the domain (h = n - 1)
        # this is 2n - 1 per axis rather than the 3n - 2 of a full linear convolution.
        rows = scipy.fft.next_fast_len(max(i1 - i0 + hy, k.shape[0]), real=True)
        if self.periodic_x:
            # x circles the globe: the convolution is circular with period nx exactly. The
            # kernel's columns are folded onto the circle (offset d -> d mod nx), offset 0 in
            # column 0, so the output needs no crop in x.
            folded = np.zeros((k.shape[0], nx))
            np.add.at(folded, (slice(None), (np.arange(k.shape[1]) - hx) % nx), k)
            padded = (rows, nx)
            kernel_hat = scipy.fft.rfft2(folded.astype(self.dtype), s=padded, workers=self.workers)
            crop = (slice(r0 - i0 + hy, r1 - i0 + hy), slice(0, nx))
            return _Block((r0, r1), (i0, i1), kernel_hat, padded, crop)
        padded = (rows, scipy.fft.next_fast_len(max(nx + hx, k.shape[1]), real=True))
        kernel_hat = scipy.fft.rfft2(k.astype(self.dtype), s=padded, workers=self.workers)
        # Full linear convolution index m maps to output row i = m - hy + i0.
        crop = (slice(r0 - i0 + hy, r1 - i0 + hy), slice(hx, hx + nx))
        return _Block((r0, r1), (i0, i1), kernel_hat, padded, crop)

    # ------------------------------------------------------------------ pressure
    def pressure(self, occupancy):
        """Propagule pressure: occupancy convolved with the kernel, floored, on shape (..., ny, nx).

        Parameters
        ----------
        occupancy : ndarray, shape (..., ny, nx)
            Occupancy or expected occupancy in [0, 1]; leading axes (e.g. replicates) are
            convolved independently.

        Returns
        -------
        ndarray, same shape, operator dtype
        """
        occ = np.asarray(occupancy)
        if occ.shape[-2:] != self.shape:
            raise InputError(f"occupancy has grid shape {occ.shape[-2:]}, expected {self.shape}")
        out = np.empty(occ.shape, dtype=self.dtype)
        for blk in self.blocks:
            i0, i1 = blk.in_rows
            slab = occ[..., i0:i1, :]
            if slab.dtype != self.dtype:
                slab = slab.astype(self.dtype)
            spec = scipy.fft.rfft2(slab, s=blk.padded, workers=self.workers)
            spec *= blk.kernel_hat
            full = scipy.fft.irfft2(spec, s=blk.padded, workers=self.workers, overwrite_x=True)
            out[..., blk.out_rows[0]:blk.out_rows[1], :] = full[(...,) + blk.crop]
        # Round-off far from any source is +-1e-16-ish and would grow like R^t: cut it.
        if self.pressure_floor > 0:
            out[out < self.pressure_floor] = 0.0
        else:
            np.maximum(out, 0.0, out=out)
        return out

    # ---------------------------------------------------------------------- step
    def step(self, occupancy, habitat, suitable, rate, rng=None, *, persistence_lag=0,
             unsuitable_steps=None, check=True):
        """Advance occupancy one step: disperse, colonise (habitat- and climate-gated), lose.

        Parameters
        ----------
        occupancy : ndarray, shape (..., ny, nx)
            Expected occupancy in [0, 1] (deterministic) or 0/1 (stochastic).
        habitat : ndarray, shape (ny, nx)
            Habitat quality in [0, 1]; 0 is never colonised (propagules pass over it).
        suitable : ndarray, shape (ny, nx)
            Climatic suitability for this step, 0/1 or in [0, 1].
        rate : float
            Colonisation rate R > 0 (``rate``; ``--rate`` on the command line): expected colonisations per unit pressure.
        rng : numpy.random.Generator or sequence of Generator, optional
            Given: stochastic mode (one Generator, or one per replicate along axis 0).
            None: deterministic expected occupancy.
        persistence_lag : int, default=0
            Steps an occupied cell survives unsuitable climate before it is lost.
        unsuitable_steps : ndarray of int, shape (ny, nx), optional
            Consecutive unsuitable steps per cell, updated in place; required when
            ``persistence_lag > 0`` (start from zeros and pass the same array every step).
        check : bool, default=True
            Validate value ranges (costs a few passes over the grid).

        Returns
        -------
        ndarray, same shape as ``occupancy``, operator dtype

        References
        ----------
        Kot et al. (1996); Hanski (1994): see the class docstring.
        """
        occ = np.asarray(occupancy)
        habitat = np.asarray(habitat)
        suitable = np.asarray(suitable)
        rate = float(rate)
        if not (np.isfinite(rate) and rate > 0):
            raise InputError(f"rate must be > 0, got {rate!r}")
        for name, arr in (("habitat", habitat), ("suitable", suitable)):
            if arr.shape != self.shape:
                raise InputError(f"{name} has shape {arr.shape}, expected {self.shape}")
        if check:
            for name, arr in (("habitat", habitat), ("suitable", suitable), ("occupancy", occ)):
                lo, hi = np.min(arr), np.max(arr)
                if not (lo >= 0 and hi <= 1):  # also catches NaN
                    raise InputError(f"{name} must lie in [0, 1] (fill nodata first), found range {lo}..{hi}")
        lag = int(persistence_lag)
        if lag < 0:
            raise InputError(f"persistence_lag must be >= 0, got {persistence_lag!r}")
        # Persistence: phi = s, except while still within the lag after turning unsuitable.
        if lag > 0:
            if unsuitable_steps is None or unsuitable_steps.shape != self.shape:
                raise InputError("unsuitable_steps (an int array of the grid shape) is required when persistence_lag > 0")
            unsuitable_steps += 1
            unsuitable_steps[suitable >= 1] = 0
            persist = np.where(unsuitable_steps > lag, suitable, 1.0).astype(self.dtype)
        else:
            persist = suitable.astype(self.dtype, copy=False)

        colonise = self.pressure(occ)
        # c = 1 - exp(-R * pressure * h * s), in place.
        colonise *= -rate
        colonise *= habitat
        colonise *= suitable
        np.expm1(colonise, out=colonise)
        np.negative(colonise, out=colonise)
        if rng is None:
            # p' = c + p * (phi - c), written over c a block of rows at a time: no second
            # grid-sized array (the same operations, cell by cell, as on whole grids)
            occ_t = occ.astype(self.dtype, copy=False)
            for rows in row_blocks(self.shape):
                block = (..., rows, slice(None))
                new = persist[block[1:]] - colonise[block]
                new *= occ_t[block]
                new += colonise[block]
                colonise[block] = new
            return colonise
        # Stochastic: occupied -> kept w.p. phi; empty -> colonised w.p. c.
        prob = np.where(occ > 0, persist, colonise)
        draws = self._uniform(rng, occ.shape)
        return (draws < prob).astype(self.dtype)

    def _uniform(self, rng, shape):
        if isinstance(rng, np.random.Generator):
            return rng.random(shape, dtype=self.dtype)
        rngs = list(rng)
        if len(shape) < 3 or len(rngs) != shape[0]:
            raise InputError(f"rng must be one Generator or one per replicate ({shape[0] if len(shape) > 2 else 1}), "
                             f"got {len(rngs)}")
        return np.stack([g.random(shape[1:], dtype=self.dtype) for g in rngs])
