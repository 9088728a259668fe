"""The smear-aware point-source model and its least-squares fit.

In a rectified product that is not deconvolved, a star's image is the seeing
profile averaged over the star's TDI smear kernel (the equal-time samples of
its track relative to their mean, recorded by rectify).  The product's WCS
maps the kernel's mean, i.e. the image's first moment, to the star's sky
position.  The model here is exactly that:

    m(x, y) = F * sum_j w_j / K * sum_k P_j(x - x0 - dx_k, y - y0 - dy_k) + b

with ``P_j`` pixel-integrated round Gaussians (the seeing profile as a
mixture: one Gaussian, or a Moffat profile written as a mixture), ``(dx_k,
dy_k)`` the ``K`` kernel samples with zero mean, ``F`` the flux and ``b`` the
local background.  Since each ``P_j`` is symmetric and the samples have zero
mean, the model's first moment is ``(x0, y0)`` whatever the kernel's bow: the
fitted position is the first moment, not the apex of the bow where the peak
lies.

Each Gaussian is separable, so a model is a matrix product of per-sample
1-D profiles (``(J K, ny)`` by ``(J K, nx)``), with analytic derivatives in
``x0`` and ``y0``; damped Gauss-Newton steps (Levenberg-Marquardt, with
the unit models of each evaluation reused for the linear start and the
result) fit flux, position and background of one or several stars on a stamp.
The loop here is the reference; with a fitted background the same steps run
compiled (:mod:`pipeline.stages.detect._fit_jit`).
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np
from astropy.table import Table

from pipeline.simulate._render import GaussianMixturePSF
from pipeline.stages.detect._pixel_gauss import boxed_profiles, pixel_profiles, profile_tables

__all__ = [
    "FitResult",
    "KernelGrid",
    "Response",
    "SeeingProfile",
    "fit_stars",
    "model_image",
    "reduce_kernel",
]

_FWHM_PER_SIGMA = 2.0 * np.sqrt(2.0 * np.log(2.0))


@dataclass(frozen=True)
class SeeingProfile:
    """A round seeing profile as a mixture of Gaussians, in pixels.

    Parameters
    ----------
    fwhm : float
        Full width at half maximum, pixels.
    shape : {'gaussian', 'moffat'}
        Profile family.
    beta : float
        Moffat index (ignored for a Gaussian).
    """

    fwhm: float
    shape: str = "moffat"
    beta: float = 3.5

    def __post_init__(self) -> None:
        if not np.isfinite(self.fwhm) or self.fwhm <= 0:
            raise ValueError(f"fwhm must be a positive number of pixels; got {self.fwhm!r}.")
        if self.shape not in ("gaussian", "moffat"):
            raise ValueError(f"shape must be 'gaussian' or 'moffat'; got {self.shape!r}.")

    def mixture(self) -> tuple[np.ndarray, np.ndarray]:
        """Sigmas (pixels) and flux weights (summing to 1) of the Gaussians."""
        return _mixture(self.fwhm, self.shape, self.beta)

    def with_fwhm(self, fwhm: float) -> SeeingProfile:
        """The same family with another width."""
        return SeeingProfile(float(fwhm), self.shape, self.beta)


@functools.lru_cache(maxsize=256)
def _mixture(fwhm: float, shape: str, beta: float) -> tuple[np.ndarray, np.ndarray]:
    if shape == "gaussian":
        return np.array([fwhm / _FWHM_PER_SIGMA]), np.array([1.0])
    # Eight Gauss-Laguerre components describe the Moffat core and wings to
    # < 1e-3 of the peak (the simulator renders with fewer).  The narrowest
    # carry < 1e-5 of the flux for beta < 5 (5e-6 and 8e-9 at beta 3.5): their
    # weight goes to the narrowest kept one, which changes the profile by
    # < 1e-4 of its peak and saves a quarter of the model's cost.
    mix = GaussianMixturePSF.moffat(fwhm, beta, n_components=8)
    sigmas, weights = np.asarray(mix.sigmas), np.asarray(mix.weights)
    keep = weights >= 1e-5
    keep[np.argmax(weights)] = True
    weights = weights[keep] + np.where(
        np.arange(keep.sum()) == np.argmin(sigmas[keep]), weights[~keep].sum(), 0.0
    )
    return sigmas[keep], weights


def reduce_kernel(dx: np.ndarray, dy: np.ndarray, spacing: float) -> tuple[np.ndarray, np.ndarray]:
    """Resample kernel samples along their track to about ``spacing`` apart.

    The samples are equal-time points of the star's track; the track (the
    polyline through them) is sampled again at ``m`` equal times, with ``m``
    the smallest number that keeps neighbours within ``spacing`` where the
    star moves fastest; the samples' mean is removed so the model's first
    moment is unchanged, and each axis is stretched about it to the input
    samples' variance (``m`` points of a track are narrower than it), so the
    second moments are kept too.  The first and last of the ``m`` times are
    moved out by a 24th of a step, which cancels the leading error of a mean
    over equal-time points (the midpoint rule's, from the change of speed
    and direction between the track's ends): at ``spacing`` = FWHM / 6 the
    model differs from that of the full kernel by < 3.5e-4 of its peak
    (5.5e-4 at FWHM / 8 without the end points moved), for tracks 1.5 to
    12 px long with a 1.5 px bow, FWHM 2.7 px.
    Any ``m`` is allowed: group means needed a divisor of the sample count,
    i.e. all 64 samples for a track 16 px long, twice the 33 needed.

    Parameters
    ----------
    dx, dy : ndarray, shape (K,)
        Kernel samples, pixels.
    spacing : float
        Largest wanted distance between neighbouring samples, pixels.

    Returns
    -------
    dx, dy : ndarray, shape (K',)
        ``K' <= K``; the input itself when no fewer samples would do.
    """
    # numba is imported on first use (see pixel_profiles).  Compiled: 5 us
    # instead of 60 us per source, 0.16 s of CPU less for the 3000 sources of
    # the 4096 x 4096 benchmark stretch.
    from pipeline.stages.detect._fit_jit import reduce_compiled

    return reduce_compiled(
        np.ascontiguousarray(dx, dtype=np.float64),
        np.ascontiguousarray(dy, dtype=np.float64),
        float(spacing),
    )


@dataclass(frozen=True)
class Response:
    """How a rectified pixel samples the strip, beyond the seeing and the smear.

    Rectify interpolates the strip with the Keys cubic kernel
    (:mod:`pipeline.stages.rectify._resample`): a rectified pixel is a
    weighted sum of the strip pixels around it, whose centres lie at
    ``lattice_x`` (``lattice_y``) modulo 1 from the rectified pixel centres.
    The kernel reproduces quadratics, so a star's flux and moments are kept,
    but it blurs the star's core by an amount that depends on that offset
    (a fit of the seeing width then comes out wider and the flux up to 3 %
    high at half a pixel).  TDI clocking adds a top-hat of ``row_step``
    (one strip row) along x: the charge steps one row while the image moves
    continuously.

    The interpolation at an offset other than 0 or 1/2 is not symmetric
    (its taps' third moment is not zero), so a model without it fits a
    star's centre off its first moment: by ~0.06 px per pixel of offset on
    the demo's nights (1.3 px sigma), and half that on the demo's tiles.  An
    image resampled from the rectified one (a mosaic tile) keeps the taps,
    turned into its own pixels: ``step_x`` (``step_y``) is the image's
    pixels per rectified pixel along its x (y), negative where its axis
    runs against the night's.

    Attributes
    ----------
    lattice_x, lattice_y : float
        Offsets of the strip's pixel centres, in [0, 1) rectified pixels.
    row_step : float
        Length of one strip row along x, rectified pixels (0: no top-hat).
    step_x, step_y : float
        Image pixels per rectified pixel, signed (1: the rectified image itself).
    """

    lattice_x: float
    lattice_y: float
    row_step: float
    step_x: float = 1.0
    step_y: float = 1.0


def _keys(s: np.ndarray) -> np.ndarray:
    """The Keys (a = -0.5) cubic-convolution kernel at distances ``s``, pixels."""
    s = np.abs(s)
    inner = (1.5 * s - 2.5) * s * s + 1.0
    outer = ((-0.5 * s + 2.5) * s - 4.0) * s + 2.0
    return np.where(s < 1.0, inner, np.where(s < 2.0, outer, 0.0))


def _sampled_profiles(grid, centres, sigmas, lattice=None, box=0.0, step=1.0):
    """Pixel profiles of :func:`pixel_profiles` as rectify samples them, shape (J, K, n).

    With a ``lattice`` offset, the profiles are the Keys interpolation at
    ``grid`` of strip pixels centred at ``lattice`` modulo 1 (four taps: the
    strip pixels within 2 px); with a ``box``, each is averaged over a
    top-hat of that width (:func:`boxed_profiles`).  ``step`` other than 1:
    ``grid`` is an image resampled from the rectified one, with ``step`` of
    its pixels per rectified pixel (signed); the taps lie ``step`` times
    their rectified distance away (:class:`Response`).
    """
    if lattice is None and box <= 0.0:
        return pixel_profiles(grid, centres, sigmas)
    if lattice is not None and step != 1.0:
        out_v = out_d = 0.0
        for e in range(5):
            w = float(_keys(np.array(e - 2.0 + lattice)))
            if w == 0.0:
                continue
            shifted = grid + step * (e - 2.0 + lattice)
            if box > 0.0:
                value, deriv = boxed_profiles(shifted, centres, sigmas, box)
            else:
                value, deriv = pixel_profiles(shifted, centres, sigmas)
            out_v = out_v + w * value
            out_d = out_d + w * deriv
        return out_v, out_d
    n = grid.size
    ext = grid[0] - 2.0 + (0.0 if lattice is None else lattice) + np.arange(n + 4)
    if box > 0.0:
        value, deriv = boxed_profiles(ext, centres, sigmas, box)
    else:
        value, deriv = pixel_profiles(ext, centres, sigmas)
    if lattice is None:
        return value[..., 2 : 2 + n], deriv[..., 2 : 2 + n]
    taps = _keys(np.arange(5) - 2.0 + lattice)  # strip pixel i + e for output pixel i
    out_v = np.zeros((*value.shape[:-1], n))
    out_d = np.zeros_like(out_v)
    for e, w in enumerate(taps):
        out_v += w * value[..., e : e + n]
        out_d += w * deriv[..., e : e + n]
    return out_v, out_d


class KernelGrid:
    """Fast lookup of recorded smear kernels (the rectify ``smear_kernels`` table).

    Same rule as :func:`pipeline.stages.rectify.smear_kernel_at`: the recorded
    column nearest to ``x``, linear interpolation in ``y`` between recorded
    rows, sample by sample (samples of equal time correspond).

    Parameters
    ----------
    kernels : astropy.table.Table
        Columns ``x``, ``y`` (night rectified pixels), ``dx``, ``dy``
        (shape ``(n, K)``, pixels).
    """

    def __init__(self, kernels: Table) -> None:
        xs = np.asarray(kernels["x"], dtype=float)
        self.columns = np.unique(xs)
        self._rows = []
        names = ("lattice_x", "lattice_y", "row_step")
        self._responses = [] if all(n in kernels.colnames for n in names) else None
        # a resampled image's steps (a mosaic tile's); 1 on a rectified one
        steps = [n for n in ("lattice_step_x", "lattice_step_y") if n in kernels.colnames]
        names = names + tuple(steps)
        self._n_values = len(names)
        for column in self.columns:
            sel = np.flatnonzero(xs == column)
            ys = np.asarray(kernels["y"], dtype=float)[sel]
            order = np.argsort(ys)
            dx = np.asarray(kernels["dx"], dtype=float)[sel][order]
            dy = np.asarray(kernels["dy"], dtype=float)[sel][order]
            self._rows.append((ys[order], dx, dy))
            if self._responses is not None:
                self._responses.append(
                    np.column_stack([np.asarray(kernels[n], float)[sel][order] for n in names])
                )

    def response(self, x: float, y: float) -> Response | None:
        """The resampling and clocking :class:`Response` at ``(x, y)``; None if not recorded.

        Linear in ``y`` between recorded rows and in ``x`` between recorded
        columns: the lattice offsets drift along x (by ~6e-5 px per column
        on the test nights), so the nearest column would be up to 0.03 px off.
        """
        if self._responses is None:
            return None
        n = self._n_values
        per_column = [np.array([np.interp(y, rows[0], v[:, k]) for k in range(n)])
                      for rows, v in zip(self._rows, self._responses, strict=True)]  # fmt: skip
        values = np.array(
            [np.interp(x, self.columns, [p[k] for p in per_column]) for k in range(n)]
        )
        offsets = (float(values[0] % 1.0), float(values[1] % 1.0))
        return Response(*offsets, *(float(v) for v in values[2:]))

    def responses(self, x: np.ndarray, y: np.ndarray) -> list[Response | None]:
        """The :meth:`response` at many positions, in one pass; None each if not recorded.

        The same values as :meth:`response` point by point (numpy's ``interp``
        along ``y`` for all positions at once, and its formula along ``x``),
        with a few array operations for all of them instead of ~20 ``interp``
        calls each (0.14 s of CPU of 3.2 s on a crowded 1035 x 4096 stretch).
        """
        x = np.atleast_1d(np.asarray(x, dtype=float))
        y = np.atleast_1d(np.asarray(y, dtype=float))
        if self._responses is None:
            return [None] * x.size
        pairs = zip(self._rows, self._responses, strict=True)
        # (column, quantity, position), each row as np.interp gives it
        n = self._n_values
        per_column = np.array([[np.interp(y, rows[0], v[:, k]) for k in range(n)]
                               for rows, v in pairs])  # fmt: skip
        values = [_interp_each(x, self.columns, per_column[:, k]) for k in range(n)]
        return [
            Response(float(a % 1.0), float(b % 1.0), float(c), *map(float, rest))
            for a, b, c, *rest in zip(*values, strict=True)
        ]

    def row_steps(self, x: np.ndarray, y: np.ndarray) -> np.ndarray | None:
        """The clocking top-hat's length along x at many positions, pixels; None if not recorded.

        The ``row_step`` of :meth:`response` (the same interpolation: linear
        in ``y`` within each recorded column, then in ``x`` between columns)
        for all positions in one pass.
        """
        if self._responses is None:
            return None
        x = np.atleast_1d(np.asarray(x, dtype=float))
        y = np.atleast_1d(np.asarray(y, dtype=float))
        pairs = zip(self._rows, self._responses, strict=True)
        per_column = np.array([np.interp(y, rows[0], v[:, 2]) for rows, v in pairs])
        if self.columns.size == 1:
            return per_column[0]
        k = np.clip(np.searchsorted(self.columns, x) - 1, 0, self.columns.size - 2)
        t = np.clip((x - self.columns[k]) / (self.columns[k + 1] - self.columns[k]), 0.0, 1.0)
        n = np.arange(x.size)
        return (1.0 - t) * per_column[k, n] + t * per_column[k + 1, n]

    def __call__(self, x: float, y: float) -> tuple[np.ndarray, np.ndarray]:
        """Kernel samples ``(dx, dy)`` at night rectified position ``(x, y)``, pixels."""
        ys, dx, dy = self._rows[int(np.argmin(np.abs(self.columns - x)))]
        if ys.size == 1:
            return dx[0], dy[0]
        # Python's min/max on scalars: a lookup costs 9 us instead of 16 us with
        # np.clip (least of 5), 0.12 s over the benchmark's 17 000 lookups.
        k = min(max(int(np.searchsorted(ys, y)) - 1, 0), ys.size - 2)
        t = min(max(float((y - ys[k]) / (ys[k + 1] - ys[k])), 0.0), 1.0)
        return (1 - t) * dx[k] + t * dx[k + 1], (1 - t) * dy[k] + t * dy[k + 1]

    def many(self, x: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """The kernels of :meth:`__call__` at many positions, shape (n, K) each.

        The same samples to the bit (nearest column, the same linear
        interpolation in ``y``), in a few array operations per recorded
        column instead of ~10 numpy calls per position.
        """
        x = np.atleast_1d(np.asarray(x, dtype=float))
        y = np.atleast_1d(np.asarray(y, dtype=float))
        size = self._rows[0][1].shape[1]
        out_x, out_y = np.empty((x.size, size)), np.empty((x.size, size))
        if x.size == 0:
            return out_x, out_y
        nearest = np.argmin(np.abs(self.columns[:, None] - x[None, :]), axis=0)
        for c in np.unique(nearest):
            sel = np.flatnonzero(nearest == c)
            ys, dx, dy = self._rows[c]
            if ys.size == 1:
                out_x[sel], out_y[sel] = dx[0], dy[0]
                continue
            k = np.clip(np.searchsorted(ys, y[sel]) - 1, 0, ys.size - 2)
            t = np.clip((y[sel] - ys[k]) / (ys[k + 1] - ys[k]), 0.0, 1.0)[:, None]
            out_x[sel] = (1 - t) * dx[k] + t * dx[k + 1]
            out_y[sel] = (1 - t) * dy[k] + t * dy[k + 1]
        return out_x, out_y

    def extents(self, x: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Largest ``|dx|`` and ``|dy|`` of the kernels at many positions, pixels, shape (n,) each.

        The kernels of :meth:`many`: 0.02 s instead of 0.15 s for 3000
        positions looked up one by one.
        """
        dx, dy = self.many(x, y)
        return np.max(np.abs(dx), axis=1, initial=0.0), np.max(np.abs(dy), axis=1, initial=0.0)


def _interp_each(x: np.ndarray, xp: np.ndarray, fp: np.ndarray) -> np.ndarray:
    """``np.interp(x[i], xp, fp[:, i])`` for each ``i``, with numpy's arithmetic.

    ``xp`` increasing, shape (m,); ``fp`` shape (m, n); ``x`` shape (n,).
    As numpy's ``interp``: the end values outside ``xp`` and at its last
    node, else ``slope * (x - xp[j]) + fp[j]`` with
    ``slope = (fp[j + 1] - fp[j]) / (xp[j + 1] - xp[j])``, so the results
    are the same to the bit.
    """
    if xp.size == 1:
        return fp[0].copy()
    n = np.arange(x.size)
    j = np.clip(np.searchsorted(xp, x, side="right") - 1, 0, xp.size - 2)
    slope = (fp[j + 1, n] - fp[j, n]) / (xp[j + 1] - xp[j])
    out = slope * (x - xp[j]) + fp[j, n]
    out = np.where(x < xp[0], fp[0], out)
    return np.where(x >= xp[-1], fp[-1], out)


def _unit_model(xs, ys, x0, y0, dx, dy, sigmas, weights, derivatives=False, response=None):
    """Unit-flux model on the pixel grid ``ys`` x ``xs``; shape (ny, nx).

    ``response`` (:class:`Response` or None) adds rectify's resampling and
    the clocking top-hat.
    """
    if response is None:
        gx, dgx = pixel_profiles(xs, x0 + dx, sigmas)
        gy, dgy = pixel_profiles(ys, y0 + dy, sigmas)
    else:
        gx, dgx = _sampled_profiles(
            xs, x0 + dx, sigmas, response.lattice_x, response.row_step, response.step_x
        )
        gy, dgy = _sampled_profiles(ys, y0 + dy, sigmas, response.lattice_y, 0.0, response.step_y)
    scale = (weights / dx.size)[:, None, None]
    a = (gx * scale).reshape(-1, xs.size)
    b = gy.reshape(-1, ys.size)
    model = b.T @ a
    if not derivatives:
        return model
    d_x0 = b.T @ (dgx * scale).reshape(-1, xs.size)
    d_y0 = dgy.reshape(-1, ys.size).T @ a
    return model, d_x0, d_y0


def model_image(
    shape: tuple[int, int],
    x0: float,
    y0: float,
    dx: np.ndarray,
    dy: np.ndarray,
    profile: SeeingProfile,
    flux: float = 1.0,
    response: Response | None = None,
) -> np.ndarray:
    """Render the smear-aware model of one star on an image grid.

    Parameters
    ----------
    shape : (int, int)
        ``(ny, nx)``; pixel ``[j, i]`` is centred on ``(x, y) = (i, j)``.
    x0, y0 : float
        First moment of the star, pixels.
    dx, dy : ndarray, shape (K,)
        Smear-kernel samples (zero mean), pixels.
    profile : SeeingProfile
    flux : float
        Total flux (electrons).
    response : Response or None
        Rectify's resampling and the clocking top-hat; None: neither.

    Returns
    -------
    ndarray, shape (ny, nx)
    """
    # numba is imported on first use (see pixel_profiles).  Compiled: 0.6 ms
    # instead of 1.1 ms with the numpy model (:func:`_unit_model`, the
    # reference) for a 31 x 45 stamp, 40 kernel samples and a resampling
    # response (least of 3); detect renders one per source to search the
    # image minus the models.
    from pipeline.stages.detect._fit_jit import model_compiled

    sigmas, weights = profile.mixture()
    return flux * model_compiled(
        float(x0),
        float(y0),
        0.0,
        int(shape[1]),
        0.0,
        int(shape[0]),
        np.ascontiguousarray(dx, dtype=np.float64),
        np.ascontiguousarray(dy, dtype=np.float64),
        np.ascontiguousarray(sigmas, dtype=np.float64),
        np.ascontiguousarray(weights, dtype=np.float64),
        _response_row(response),
        *profile_tables(),
    )


def _response_row(response: Response | None) -> np.ndarray:
    """A :class:`Response` as the compiled model takes it (-1, -1, 0, 1, 1: none)."""
    if response is None:
        return np.array([-1.0, -1.0, 0.0, 1.0, 1.0])
    return np.array(
        [response.lattice_x, response.lattice_y, response.row_step, response.step_x,
         response.step_y]
    )  # fmt: skip


def _kernel_samples(kernels) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Many kernels' samples end to end, as the compiled models take them.

    Returns ``dx`` and ``dy`` (float64, each kernel's samples flattened, one
    kernel after the other) and ``bounds`` (int64, shape ``(n + 1,)``):
    kernel ``i`` is ``[bounds[i], bounds[i + 1])``.  One ``concatenate``
    per axis (``axis=None`` flattens, ``dtype`` converts) instead of an
    ``asarray`` and a ``ravel`` per kernel: ~1 us each, ~3200 kernels per
    unit of the benchmark night at each joint fit and subtraction.
    """
    dx = np.concatenate([k[0] for k in kernels], axis=None, dtype=np.float64)
    dy = np.concatenate([k[1] for k in kernels], axis=None, dtype=np.float64)
    bounds = np.zeros(len(kernels) + 1, dtype=np.int64)
    bounds[1:] = np.cumsum([np.size(k[0]) for k in kernels])
    return dx, dy, bounds


def _response_rows(responses) -> np.ndarray:
    """:func:`_response_row` of each of ``responses`` (Response or None), shape (n, 5).

    One array from a list of tuples: an array per source cost ~1.5 us each,
    ~3600 sources per crowded stretch at each fit and subtraction.
    """
    none = (-1.0, -1.0, 0.0, 1.0, 1.0)
    rows = [none if r is None else (r.lattice_x, r.lattice_y, r.row_step, r.step_x, r.step_y)
            for r in responses]  # fmt: skip
    return np.array(rows, dtype=np.float64).reshape(-1, 5)


@dataclass(frozen=True)
class FitResult:
    """Result of a fit of ``n`` stars on one stamp.

    Attributes
    ----------
    flux, x, y : ndarray, shape (n,)
        Fitted flux (e-) and first-moment position (pixels of the image the
        stamp was cut from).
    flux_err, x_err, y_err : ndarray, shape (n,)
        One-sigma errors from the covariance of the fit, scaled by the noise
        correlation.
    background : float
        Fitted local background, e- per pixel.
    chi2 : float
        Reduced chi-square of the fit (with the variance plane as given).
    success : bool
        The optimizer converged.
    units : list of ndarray
        Unit-flux model of each star on the stamp at the fitted position.
    """

    flux: np.ndarray
    x: np.ndarray
    y: np.ndarray
    flux_err: np.ndarray
    x_err: np.ndarray
    y_err: np.ndarray
    background: float
    chi2: float
    success: bool
    units: list


def fit_stars(
    data: np.ndarray,
    variance: np.ndarray,
    x: np.ndarray,
    y: np.ndarray,
    kernels: list[tuple[np.ndarray, np.ndarray]],
    profile: SeeingProfile,
    *,
    origin: tuple[int, int] = (0, 0),
    noise_correlation: float = 1.0,
    fit_background: bool = True,
    responses: list[Response | None] | None = None,
    max_evaluations: int | None = None,
) -> FitResult:
    """Least-squares fit of flux, position and background of stars on a stamp.

    Parameters
    ----------
    data, variance : ndarray, shape (ny, nx)
        Stamp (e-) and its variance (e^2); pixels with non-finite data or
        variance, or variance <= 0, are left out.
    x, y : array-like, shape (n,)
        Starting first-moment positions, pixels of the full image.
    kernels : list of (dx, dy)
        Smear kernel samples of each star, pixels (zero mean).
    profile : SeeingProfile
        Seeing profile.
    origin : (int, int)
        ``(y, x)`` of the stamp's pixel ``[0, 0]`` in the full image.
    noise_correlation : float
        Variance of an aperture sum over the sum of the variance plane
        (rectify's ``NOISECOR``); errors are scaled by its square root.
    fit_background : bool
        Fit a constant background; otherwise it is held at zero.
    responses : list of (Response or None), optional
        Rectify's resampling and the clocking top-hat at each star (their
        lattice offsets are those of the full image: ``origin`` is integer).
    max_evaluations : int or None
        Most model evaluations after the start; a fit not converged by then
        ends unconverged (``success`` False).  None: ``100`` per parameter,
        MINPACK's default for an analytic Jacobian.

    Returns
    -------
    FitResult
    """
    # numba is imported on first use (see pixel_profiles).
    from pipeline.stages.detect._fit_jit import weighted_compiled

    x = np.atleast_1d(np.asarray(x, dtype=float))
    y = np.atleast_1d(np.asarray(y, dtype=float))
    n = x.size
    ny, nx = data.shape
    # sw = 1 / sigma and d = data / sigma, 0 where a pixel is left out
    sw, d, n_good = weighted_compiled(
        np.asarray(data, dtype=np.float64), np.asarray(variance, dtype=np.float64)
    )
    sigmas, weights = profile.mixture()
    nb = 1 if fit_background else 0
    responses = [None] * n if responses is None else list(responses)
    if max_evaluations is None:
        max_evaluations = 100 * (nb + 3 * n)
    if nb and n:
        compiled = _fit_one(
            d, sw, origin, (ny, nx), x, y, kernels, sigmas, weights, responses, max_evaluations
        )
        if compiled is not None:
            p, jac, units, chi2_sum, success = compiled
            return _fit_result(p, jac, units, chi2_sum, success, n_good, nb, noise_correlation)
    xs = np.arange(nx, dtype=float) + origin[1]
    ys = np.arange(ny, dtype=float) + origin[0]

    def models_at(p):
        """Unit models of the stars at the positions in ``p`` and their derivatives."""
        return [
            _unit_model(
                xs, ys, p[nb + 3 * i + 1], p[nb + 3 * i + 2], *kernels[i], sigmas, weights, True,
                responses[i],
            )
            for i in range(n)
        ]  # fmt: skip

    def assemble(p, models):
        """Weighted residual, weighted Jacobian and the unit models at ``p``."""
        jac = np.empty((d.size, p.size))
        if nb:
            jac[:, 0] = sw
        model = np.full(d.size, p[0] if nb else 0.0)
        for i, (u, ux, uy) in enumerate(models):
            f = p[nb + 3 * i]
            u = u.ravel()
            model += f * u
            jac[:, nb + 3 * i] = u * sw
            jac[:, nb + 3 * i + 1] = f * ux.ravel() * sw
            jac[:, nb + 3 * i + 2] = f * uy.ravel() * sw
        return model * sw - d, jac, models

    def evaluate(p):
        """Weighted residual, weighted Jacobian and the unit models and derivatives at ``p``."""
        return assemble(p, models_at(p))

    # Linear start: fluxes (and background) at the starting positions, from
    # the unit models the first step needs anyway.
    p = np.empty(nb + 3 * n)
    p[nb + 1 :: 3], p[nb + 2 :: 3] = x, y
    start = models_at(p)
    design = np.column_stack(([sw] if nb else []) + [u.ravel() * sw for u, _, _ in start])
    coef = np.linalg.lstsq(design, d, rcond=None)[0]
    if nb:
        p[0] = coef[0]
    p[nb::3] = np.maximum(coef[nb:], 1e-3 * np.abs(coef[nb:]).max() + 1e-6)
    p, jac, units, chi2_sum, success = _levenberg_marquardt(
        evaluate, p, nb, n, first=assemble(p, start), max_evaluations=max_evaluations
    )
    return _fit_result(p, jac, units, chi2_sum, success, n_good, nb, noise_correlation)


def _fit_one(d, sw, origin, shape, x, y, kernels, sigmas, weights, responses, max_evaluations):
    """The stars and a background fitted in one compiled call; None to fit in Python.

    :func:`~pipeline.stages.detect._fit_jit.fit_compiled` takes the same
    steps as the Python loop, for one star or a group; measured on the
    benchmark's stamps, 0.15 to 0.5 ms per single-star fit instead of 0.6 to
    1.1 ms (``benchmarks/bench_detect.py`` stars of short and long tracks).
    A singular step (None) is left to the Python loop, which reports it.
    """
    # numba is imported on first use (see pixel_profiles).
    from pipeline.stages.detect._fit_jit import fit_compiled

    if len(kernels) == 1:  # most fits: one star, its samples as they are
        dx = np.ascontiguousarray(kernels[0][0], dtype=np.float64).ravel()
        dy = np.ascontiguousarray(kernels[0][1], dtype=np.float64).ravel()
        bounds = np.array([0, dx.size], dtype=np.int64)
    else:
        dx, dy, bounds = _kernel_samples(kernels)
    p, jac, units, chi2, status = fit_compiled(
        d,
        sw,
        float(origin[1]),
        int(shape[1]),
        float(origin[0]),
        int(shape[0]),
        np.array(x, dtype=np.float64),
        np.array(y, dtype=np.float64),
        dx,
        dy,
        bounds,
        np.ascontiguousarray(sigmas, dtype=np.float64),
        np.ascontiguousarray(weights, dtype=np.float64),
        np.array([_response_row(r) for r in responses]),
        *profile_tables(),
        int(max_evaluations),
    )
    return None if status < 0 else (p, jac, list(units), chi2, status == 1)


def _fit_result(p, jac, units, chi2_sum, success, n_good, nb, noise_correlation) -> FitResult:
    """:class:`FitResult` of the parameters ``p`` (background first if ``nb``).

    ``n_good``: the number of pixels fitted.
    """
    from pipeline.stages.detect._fit_jit import errors_compiled

    dof = max(int(n_good) - p.size, 1)
    err, ok = errors_compiled(np.ascontiguousarray(jac, dtype=np.float64), float(noise_correlation))
    if not ok:  # singular
        err = np.full(p.size, np.nan)
    return FitResult(
        flux=p[nb::3].copy(),
        x=p[nb + 1 :: 3].copy(),
        y=p[nb + 2 :: 3].copy(),
        flux_err=err[nb::3],
        x_err=err[nb + 1 :: 3],
        y_err=err[nb + 2 :: 3],
        background=float(p[0]) if nb else 0.0,
        chi2=chi2_sum / dof,
        success=success,
        units=units,
    )


def _levenberg_marquardt(evaluate, p, nb, n, first=None, max_evaluations=None):
    """Damped Gauss-Newton steps from ``p`` until the step is statistically nothing.

    ``evaluate(p)`` returns the weighted residual, the weighted Jacobian and
    each star's unit model and its derivatives in x and y; ``first`` is what
    it returns at ``p``, if known.  Convergence is a step whose predicted
    chi-square change ``d^T H d`` is below 1e-4 (a hundredth of a standard
    error in every parameter; the error left after it is of the order of its
    square, 1e-4 of a standard error): it is taken without evaluating the
    model there, the residual and the unit models moved to first order (the
    Jacobian, for the errors, stays that of the last point evaluated: it
    changes by ~1e-2 of a standard error's effect).  Otherwise a step is
    evaluated and accepted when it lowers the chi-square (the damping then
    falls, or rises if the fall was less than
    :data:`~pipeline.stages.detect._fit_jit.POOR_GAIN` of the predicted
    one); one that lowers it
    by less than 1e-8 of it also ends the fit (MINPACK's ``ftol``: a degenerate
    fit, e.g. two sources on one star, creeps along a valley).  Position steps are
    capped at 1 px so a poor start cannot throw a star far away.  At most
    ``max_evaluations`` evaluations (None: ``100 (p.size)``, MINPACK's
    default for an analytic Jacobian).

    Returns
    -------
    p, jac, units, chi2, converged
    """
    from pipeline.stages.detect._fit_jit import CONVERGED, POOR_GAIN

    r, jac, models = evaluate(p) if first is None else first
    chi2 = float(r @ r)
    lam = 1e-3
    for _ in range(100 * p.size if max_evaluations is None else max_evaluations):
        h = jac.T @ jac
        g = jac.T @ r
        try:
            step = -np.linalg.solve(h + lam * np.diag(np.diag(h)), g)
        except np.linalg.LinAlgError:
            return p, jac, [m[0] for m in models], chi2, False
        moves = np.abs(np.concatenate([step[nb + 1 :: 3], step[nb + 2 :: 3]]))
        if moves.size and moves.max() > 1.0:
            step *= 1.0 / moves.max()
        predicted = float(step @ h @ step)
        if predicted < 1e-4 or predicted * (1.0 + lam) ** 2 < CONVERGED:  # to first order
            units = [
                u + step[nb + 3 * i + 1] * ux + step[nb + 3 * i + 2] * uy
                for i, (u, ux, uy) in enumerate(models)
            ]
            moved = r + jac @ step
            return p + step, jac, units, float(moved @ moved), True
        trial = p + step
        r_new, jac_new, models_new = evaluate(trial)
        chi2_new = float(r_new @ r_new)
        if np.isfinite(chi2_new) and chi2_new <= chi2:
            gain = chi2 - chi2_new
            expected = -(2.0 * float(g @ step) + float(step @ h @ step))
            p, r, jac, models, chi2 = trial, r_new, jac_new, models_new, chi2_new
            lam = lam * 10.0 if gain < POOR_GAIN * expected else max(lam * 0.1, 1e-9)
            if gain <= 1e-8 * chi2:
                return p, jac, [m[0] for m in models], chi2, True
        else:
            lam *= 10.0
            if lam > 1e8:  # no step downhill: p is the optimum to rounding
                return p, jac, [m[0] for m in models], chi2, True
    return p, jac, [m[0] for m in models], chi2, False
