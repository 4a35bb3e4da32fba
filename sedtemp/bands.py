"""Photometric bands: response curves, flux conventions and weight vectors.

A band turns a spectrum S_nu into the flux density an observer quotes for it.
Two conventions define that number:

* the *detector*: an energy detector (bolometer) integrates S_nu R(nu) dnu; a
  photon-counting detector integrates S_nu R(nu) / (h nu) dnu;
* the *reference spectrum* f_ref(nu) used to calibrate the quoted flux density
  at the reference frequency nu_ref: ``"nu_fnu"`` (nu F_nu = const, i.e.
  f_ref ~ nu^-1), ``"fnu"`` (F_nu = const) or a float alpha (f_ref ~ nu^alpha).

The quoted flux density of a spectrum S is then

    F = int S R' dnu / int (f_ref(nu) / f_ref(nu_ref)) R' dnu,

with R' = R (energy) or R / nu (photon; the constant h cancels). Comparing a
model's F with the catalogue value *is* the colour correction, done once.

A :class:`BandSet` stores every band as a weight vector on one shared
frequency grid, so the quoted fluxes of many model spectra are a single matrix
product ``spectrum_on_grid @ weights.T``.
"""

from __future__ import annotations

import numbers
from collections.abc import Callable, Iterable, Iterator, Sequence
from pathlib import Path

import astropy.units as u
import numpy as np
from numpy.typing import ArrayLike

from ._numerics import trapezoid_weights
from ._units import to_hz
from .errors import InputError
from .planck import C_LIGHT

__all__ = ["Band", "BandSet", "DETECTORS", "REFERENCE_SPECTRA"]

#: Detector conventions: name -> power p of nu in the integration kernel
#: R' = R nu^p (energy: p = 0; photon counting: R / (h nu), h cancels in F).
DETECTORS: dict[str, float] = {"energy": 0.0, "photon": -1.0}

#: Named reference spectra: name -> alpha of f_ref(nu) ~ nu^alpha.
REFERENCE_SPECTRA: dict[str, float] = {"nu_fnu": -1.0, "fnu": 0.0}

_DEFAULT_TOPHAT_NODES = 33
# (33 nodes: for a smooth SED across a 30 % wide band the trapezoid error is
# ~(w/32)^2 / 12 * |d2 ln S/d ln nu2| ~ 1e-5 relative, far below calibration
# errors, while keeping the MCMC's model evaluations cheap.)


# ---------------------------------------------------------------------------
# validation helpers
# ---------------------------------------------------------------------------


def _check_name(name) -> str:
    if not isinstance(name, str) or not name.strip():
        raise InputError(f"band name must be a non-empty string, got {name!r}")
    return name


def _detector_power(detector, name: str) -> float:
    try:
        return DETECTORS[detector]
    except (KeyError, TypeError):
        raise InputError(
            f"band {name!r}: unknown detector {detector!r}; "
            f"use one of {sorted(DETECTORS)}"
        ) from None


def _reference_alpha(reference, name: str) -> float:
    if isinstance(reference, str):
        try:
            return REFERENCE_SPECTRA[reference]
        except KeyError:
            raise InputError(
                f"band {name!r}: unknown reference spectrum {reference!r}; use one of "
                f"{sorted(REFERENCE_SPECTRA)} or a float alpha for F_nu ~ nu^alpha"
            ) from None
    if isinstance(reference, numbers.Real) and not isinstance(reference, bool):
        alpha = float(reference)
        if np.isfinite(alpha):
            return alpha
    raise InputError(
        f"band {name!r}: reference must be one of {sorted(REFERENCE_SPECTRA)} "
        f"or a finite float alpha (F_nu ~ nu^alpha), got {reference!r}"
    )


def _spectral_hz(value, what: str, name: str) -> np.ndarray:
    """Frequencies in Hz; a zero or infinite wavelength maps to inf / 0 Hz silently
    (astropy's c / lambda would warn) and is then rejected by the caller."""
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.array(to_hz(value, name=f"band {name!r}: {what}"), dtype=float)


def _scalar_hz(value, what: str, name: str) -> float:
    nu = _spectral_hz(value, what, name)
    if nu.ndim != 0 or not np.isfinite(nu) or nu <= 0:
        raise InputError(
            f"band {name!r}: {what} must be one positive finite wavelength or "
            f"frequency, got {value!r}"
        )
    return float(nu)


def _response_array(response, name: str) -> np.ndarray:
    if isinstance(response, u.Quantity):
        try:
            response = response.to_value(u.dimensionless_unscaled)
        except u.UnitConversionError:
            raise InputError(
                f"band {name!r}: response must be dimensionless, got unit "
                f"{response.unit}"
            ) from None
    try:
        return np.array(response, dtype=float)
    except (TypeError, ValueError) as err:
        raise InputError(f"band {name!r}: cannot read the response as numbers") from err


def _sorted_nodes(nu_hz: np.ndarray, resp: np.ndarray, name: str):
    """Validate a response curve and return it sorted by increasing frequency."""
    if nu_hz.ndim != 1 or resp.shape != nu_hz.shape:
        raise InputError(
            f"band {name!r}: abscissa and response must be 1-D arrays of the same "
            f"length, got shapes {nu_hz.shape} and {resp.shape}"
        )
    if nu_hz.size < 2:
        raise InputError(
            f"band {name!r}: a response curve needs at least 2 nodes, got "
            f"{nu_hz.size}; use Band.monochromatic for a single wavelength"
        )
    bad_x = int(np.count_nonzero(~(np.isfinite(nu_hz) & (nu_hz > 0))))
    if bad_x:
        raise InputError(
            f"band {name!r}: {bad_x} abscissa value(s) are not positive finite "
            "wavelengths/frequencies; remove them"
        )
    bad_r = int(np.count_nonzero(~np.isfinite(resp)))
    if bad_r:
        raise InputError(
            f"band {name!r}: {bad_r} response value(s) are not finite; remove or fill them"
        )
    if np.any(resp < 0):
        raise InputError(
            f"band {name!r}: response is negative at {int(np.count_nonzero(resp < 0))} "
            f"node(s) (minimum {resp.min():g}); clip it to zero"
        )
    if not np.any(resp > 0):
        raise InputError(f"band {name!r}: response is zero everywhere")
    order = np.argsort(nu_hz, kind="stable")
    nu_hz, resp = nu_hz[order], resp[order]
    if np.any(np.diff(nu_hz) == 0):
        raise InputError(
            f"band {name!r}: repeated wavelength/frequency node(s); each abscissa "
            "value must appear once"
        )
    return nu_hz, resp


def _readonly(a: np.ndarray) -> np.ndarray:
    a = np.array(a, dtype=float)
    a.setflags(write=False)
    return a


def _evaluate_spectrum(spectrum, nu_hz: np.ndarray, what: str) -> np.ndarray:
    """Call ``spectrum(nu_hz)``; the result must have last axis len(nu_hz), finite."""
    if not callable(spectrum):
        raise InputError(
            f"spectrum must be a callable f(nu_hz) -> flux density array, got "
            f"{type(spectrum).__name__}"
        )
    s = spectrum(nu_hz.copy())
    if isinstance(s, u.Quantity):
        s = s.value  # K is a ratio: any linear flux unit cancels
    s = np.asarray(s, dtype=float)
    if s.ndim == 0 or s.shape[-1] != nu_hz.size:
        raise InputError(
            f"spectrum({what}) must return an array whose last axis has length "
            f"{nu_hz.size}, got shape {s.shape}"
        )
    if not np.all(np.isfinite(s)):
        raise InputError(f"spectrum({what}) returned non-finite values")
    return s


def _ratio_or_raise(flux: np.ndarray, s_ref: np.ndarray, names) -> np.ndarray:
    zero = s_ref == 0
    if np.any(zero):
        idx = np.nonzero(np.any(zero.reshape(-1, zero.shape[-1]), axis=0))[0]
        bad = ", ".join(repr(names[i]) for i in idx)
        raise InputError(
            f"colour correction undefined: the spectrum is zero at the reference "
            f"frequency of band(s) {bad}"
        )
    return flux / s_ref


# ---------------------------------------------------------------------------
# Band
# ---------------------------------------------------------------------------


class Band:
    """One photometric band: response curve, detector and reference convention.

    Parameters
    ----------
    name : str
        Band name (unique within a :class:`BandSet`), e.g. ``"k160"``.
    nu_or_wavelength : Quantity or array_like, shape (n_nodes,)
        Abscissa of the response curve: frequencies or wavelengths (any
        unit convertible via ``u.spectral()``). Bare numbers are wavelengths
        in um. Any order; nodes are sorted by frequency.
    response : array_like, shape (n_nodes,)
        Dimensionless relative response (transmission) at each node, >= 0.
        Its normalisation is irrelevant. It is a function value, not a
        density, so no Jacobian is applied when the abscissa is a wavelength.
    detector : {"energy", "photon"}, optional
        ``"energy"`` (bolometer; signal ~ int S_nu R dnu) or ``"photon"``
        (photon counting; signal ~ int S_nu R / (h nu) dnu). Default
        ``"energy"``.
    reference : {"nu_fnu", "fnu"} or float, optional
        Reference spectrum of the quoted flux density: ``"nu_fnu"``
        (nu F_nu = const), ``"fnu"`` (F_nu = const) or a float alpha
        (F_nu ~ nu^alpha). Default ``"nu_fnu"``.
    reference_wavelength : Quantity or float, optional
        Wavelength (or frequency) at which the flux density is quoted; bare
        number in um. Must lie within the curve's nodes. Default: the
        response-weighted mean frequency ``int nu R' dnu / int R' dnu``
        (see Notes). Set it to the nominal wavelength of the instrument's
        calibration documents whenever one exists.

    Attributes
    ----------
    name : str
    nu_hz : ndarray, shape (n_nodes,)
        Node frequencies in Hz, increasing.
    response : ndarray, shape (n_nodes,)
        Response at the nodes.
    weights : ndarray, shape (n_nodes,)
        Quadrature weights: the quoted flux of a spectrum S sampled at
        ``nu_hz`` is ``S @ weights`` (in the unit of S).
    nu_ref_hz : float
        Reference frequency in Hz.
    detector : str or None
        ``None`` for a monochromatic band.
    reference : str, float or None
        ``None`` for a monochromatic band.
    reference_alpha : float or None
        alpha of the reference spectrum nu^alpha.

    Raises
    ------
    InputError
        Fewer than 2 nodes, non-finite or repeated nodes, negative or
        all-zero response, a unit that is neither frequency nor wavelength,
        a non-dimensionless response, an unknown convention, or a reference
        wavelength outside the curve.

    Notes
    -----
    The quoted flux density at nu_ref of a spectrum S is

        F = int S R' dnu / int (nu / nu_ref)^alpha R' dnu,

    R' = R (energy) or R / nu (photon). Both integrals use the trapezoid
    rule on the band's own nodes, so a source with the reference spectrum
    gets F = S(nu_ref) to rounding, whatever the node spacing. The colour
    correction is K = F / S(nu_ref) (:meth:`color_correction`).

    The default reference frequency is the R'-weighted mean frequency:
    ``int nu R dnu / int R dnu`` for an energy detector and
    ``int R dnu / int R / nu dnu`` for a photon detector, i.e. the frequency
    at which the band is centred as the detector sees it.

    References
    ----------
    Flux densities quoted for a nu^-1 reference spectrum (the common far-IR
    catalogue convention): true flux density = quoted / K, with K the ratio
    of response-weighted integrals of the source and reference spectra.
    Photon-counting passbands weight by R / (h nu): Bessell & Murphy (2012,
    PASP 124, 140), Appendix A (from memory).
    """

    name: str
    nu_hz: np.ndarray
    response: np.ndarray
    weights: np.ndarray
    nu_ref_hz: float
    detector: str | None
    reference: str | float | None
    reference_alpha: float | None

    def __init__(
        self,
        name: str,
        nu_or_wavelength: u.Quantity | ArrayLike,
        response: u.Quantity | ArrayLike,
        *,
        detector: str = "energy",
        reference: str | float = "nu_fnu",
        reference_wavelength: u.Quantity | float | None = None,
    ) -> None:
        name = _check_name(name)
        power = _detector_power(detector, name)
        alpha = _reference_alpha(reference, name)
        nu_hz = _spectral_hz(nu_or_wavelength, "abscissa", name)
        nu_hz, resp = _sorted_nodes(nu_hz, _response_array(response, name), name)

        kernel = trapezoid_weights(nu_hz) * resp * nu_hz**power
        if reference_wavelength is None:
            nu_ref = float(np.sum(kernel * nu_hz) / np.sum(kernel))
        else:
            nu_ref = _scalar_hz(reference_wavelength, "reference_wavelength", name)
            if not nu_hz[0] <= nu_ref <= nu_hz[-1]:
                lam = C_LIGHT / np.array([nu_hz[-1], nu_hz[0], nu_ref]) * 1e6
                raise InputError(
                    f"band {name!r}: reference_wavelength {lam[2]:.6g} um lies outside "
                    f"the response curve ({lam[0]:.6g}-{lam[1]:.6g} um); check its unit"
                )
        norm = np.sum(kernel * (nu_hz / nu_ref) ** alpha)
        self._set(name, nu_hz, resp, kernel / norm, nu_ref, detector, reference, alpha)

    def _set(self, name, nu_hz, resp, weights, nu_ref, detector, reference, alpha):
        self.name = name
        self.nu_hz = _readonly(nu_hz)
        self.response = _readonly(resp)
        self.weights = _readonly(weights)
        self.nu_ref_hz = float(nu_ref)
        self.detector = detector
        self.reference = reference
        self.reference_alpha = alpha

    # -- constructors -------------------------------------------------------

    @classmethod
    def monochromatic(cls, name: str, wavelength: u.Quantity | float) -> Band:
        """A band that quotes the spectrum's value at one wavelength.

        Parameters
        ----------
        name : str
            Band name.
        wavelength : Quantity or float
            Wavelength or frequency; bare number in um.

        Returns
        -------
        Band
            A single node at nu_ref with weight 1: F = S(nu_ref) exactly, so
            K = 1 for every spectrum. ``detector`` and ``reference`` are None.

        Raises
        ------
        InputError
            If the wavelength is not one positive finite value.
        """
        name = _check_name(name)
        nu = _scalar_hz(wavelength, "wavelength", name)
        band = cls.__new__(cls)
        band._set(name, [nu], [1.0], [1.0], nu, None, None, None)
        return band

    @classmethod
    def tophat(
        cls,
        name: str,
        center: u.Quantity | float,
        fractional_width: float,
        *,
        detector: str = "energy",
        reference: str | float = "nu_fnu",
        n_nodes: int = _DEFAULT_TOPHAT_NODES,
    ) -> Band:
        """A rectangular band, flat in frequency, quoted at its centre.

        Parameters
        ----------
        name : str
            Band name.
        center : Quantity or float
            Centre wavelength (or frequency); bare number in um. It is the
            reference frequency nu_c.
        fractional_width : float
            Full width over centre in frequency, dnu / nu_c, in (0, 2): the
            band covers nu_c (1 - w/2) to nu_c (1 + w/2).
        detector, reference : see :class:`Band`.
        n_nodes : int, optional
            Number of nodes, evenly spaced in frequency, >= 2 (default 101).

        Returns
        -------
        Band

        Raises
        ------
        InputError
            Bad width, node count or centre.

        Notes
        -----
        R = 1 on [nu_lo, nu_hi] and 0 outside; the trapezoid integrals on the
        nodes are exact for a linear integrand and carry a relative error of
        order (h / nu_c)^2 / 12 otherwise (h the node spacing).
        """
        name = _check_name(name)
        nu_c = _scalar_hz(center, "center", name)
        w = fractional_width
        if not (isinstance(w, numbers.Real) and not isinstance(w, bool) and 0 < w < 2):
            raise InputError(
                f"band {name!r}: fractional_width must be a number in (0, 2) "
                f"(dnu / nu_center), got {fractional_width!r}"
            )
        if isinstance(n_nodes, bool) or not isinstance(n_nodes, numbers.Integral) or n_nodes < 2:
            raise InputError(
                f"band {name!r}: n_nodes must be an integer >= 2, got {n_nodes!r}"
            )
        nu = np.linspace(nu_c * (1 - 0.5 * w), nu_c * (1 + 0.5 * w), int(n_nodes))
        return cls(
            name,
            nu * u.Hz,
            np.ones_like(nu),
            detector=detector,
            reference=reference,
            reference_wavelength=nu_c * u.Hz,
        )

    @classmethod
    def from_file(
        cls,
        name: str,
        path: str | Path,
        *,
        detector: str = "energy",
        reference: str | float = "nu_fnu",
        reference_wavelength: u.Quantity | float | None = None,
        format: str | None = None,
    ) -> Band:
        """Read a response curve from a two-column table file.

        Parameters
        ----------
        name : str
            Band name.
        path : str or os.PathLike
            File with exactly two columns: the abscissa (frequency or
            wavelength, **with a unit**) and the dimensionless response.
        detector, reference, reference_wavelength : see :class:`Band`.
        format : str, optional
            astropy ``Table.read`` format. Default: ``"ascii.ecsv"`` for a
            ``.ecsv`` suffix, otherwise astropy's own format detection
            (FITS, VOTable, ...) with ``"ascii"`` as fallback.

        Returns
        -------
        Band

        Raises
        ------
        InputError
            Unreadable file, not two columns, abscissa without a unit or with
            a non-spectral unit, non-dimensionless response, plus everything
            :class:`Band` rejects.

        Examples
        --------
        An ECSV file whose header declares the unit::

            # %ECSV 1.0
            # ---
            # datatype:
            # - {name: wavelength, unit: um, datatype: float64}
            # - {name: response, datatype: float64}
            wavelength response
            200.0 0.0
            ...
        """
        from astropy.table import Table

        name = _check_name(name)
        table = _read_table(Table, Path(path), format, name)
        if len(table.colnames) != 2:
            raise InputError(
                f"band {name!r}: {path} has {len(table.colnames)} columns "
                f"({', '.join(table.colnames)}); expected 2 (abscissa, response)"
            )
        xcol, rcol = (table[c] for c in table.colnames)
        if xcol.unit is None:
            raise InputError(
                f"band {name!r}: column {xcol.name!r} in {path} has no unit; write the "
                "file as ECSV with a unit in its header, e.g. "
                f"'# - {{name: {xcol.name}, unit: um, datatype: float64}}', "
                "or build the band with Band(name, values * u.um, response)"
            )
        x = _filled(xcol) * xcol.unit
        r = _filled(rcol)
        if rcol.unit is not None:
            r = r * rcol.unit
        return cls(
            name,
            x,
            r,
            detector=detector,
            reference=reference,
            reference_wavelength=reference_wavelength,
        )

    # -- derived quantities -------------------------------------------------

    @property
    def is_monochromatic(self) -> bool:
        """True for a single-node band (F = S(nu_ref))."""
        return self.nu_hz.size == 1

    @property
    def reference_wavelength(self) -> u.Quantity:
        """Reference wavelength c / nu_ref as a Quantity in um."""
        return (C_LIGHT / self.nu_ref_hz * u.m).to(u.um)

    def color_correction(self, spectrum: Callable[[np.ndarray], np.ndarray]) -> np.ndarray:
        """Colour correction K = F_quoted / S(nu_ref) of a spectrum in this band.

        Parameters
        ----------
        spectrum : callable
            ``f(nu_hz) -> ndarray`` of flux density (any linear unit) with the
            frequency axis last, shape (..., n_nu) for ``nu_hz`` of shape
            (n_nu,). Extra leading axes (many models) are kept.

        Returns
        -------
        ndarray, shape (...)
            K. The quoted flux of a source with this spectrum is
            K S(nu_ref); conversely the true monochromatic flux density at
            nu_ref of an observed source is F_quoted / K.

        Raises
        ------
        InputError
            ``spectrum`` not callable, wrong output shape, non-finite values,
            or S(nu_ref) = 0.
        """
        flux = _evaluate_spectrum(spectrum, np.array(self.nu_hz), "band nodes") @ self.weights
        s_ref = _evaluate_spectrum(spectrum, np.array([self.nu_ref_hz]), "nu_ref")
        return _ratio_or_raise(np.asarray(flux)[..., None], s_ref, (self.name,))[..., 0]

    def __repr__(self) -> str:
        lam = self.reference_wavelength.value
        if self.is_monochromatic:
            return f"Band({self.name!r}, monochromatic at {lam:.6g} um)"
        return (
            f"Band({self.name!r}, {self.nu_hz.size} nodes, nu_ref at {lam:.6g} um, "
            f"detector={self.detector!r}, reference={self.reference!r})"
        )


def _read_table(table_cls, path: Path, format, name: str):
    from astropy.io.registry import IORegistryError

    if format is None and path.suffix.lower() == ".ecsv":
        format = "ascii.ecsv"
    try:
        if format is not None:
            return table_cls.read(path, format=format)
        try:
            return table_cls.read(path)
        except IORegistryError:  # no binary/self-identifying format: plain text
            return table_cls.read(path, format="ascii")
    except (OSError, ValueError, TypeError, IORegistryError) as err:
        raise InputError(f"band {name!r}: cannot read response file {path}: {err}") from err


def _filled(col) -> np.ndarray:
    """Column values as floats, masked entries as NaN (rejected later as non-finite)."""
    if getattr(col, "mask", None) is not None:
        return np.array(col.filled(np.nan), dtype=float)
    return np.array(col, dtype=float)


# ---------------------------------------------------------------------------
# BandSet
# ---------------------------------------------------------------------------


class BandSet:
    """Several bands sharing one frequency grid, each as a weight vector.

    Parameters
    ----------
    bands : iterable of Band
        At least one band; names must be unique.

    Attributes
    ----------
    bands : tuple of Band
    names : tuple of str
    nu_ref_hz : ndarray, shape (n_bands,)
        Reference frequencies in Hz.
    nu_grid_hz : ndarray, shape (n_grid,)
        Sorted union of all band nodes, Hz.
    weights : ndarray, shape (n_bands, n_grid)
        Each band's trapezoid weights (:attr:`Band.weights`) placed on its own
        nodes of the grid, zero elsewhere. A monochromatic band is a single 1.

    Raises
    ------
    InputError
        Empty input, an element that is not a Band, or duplicate names.

    Notes
    -----
    The quoted band fluxes of spectra sampled on the grid are
    ``spectrum_on_grid @ weights.T``: shape (..., n_grid) -> (..., n_bands),
    one matrix product for any number of models.

    Examples
    --------
    >>> bs = BandSet([Band.tophat("b250", 250.0, 0.3), Band.monochromatic("m850", 850.0)])
    >>> bs.weights.shape == (2, bs.nu_grid_hz.size)
    True
    """

    def __init__(self, bands: Iterable[Band]) -> None:
        if isinstance(bands, Band):
            raise InputError("BandSet takes a list of Band objects; wrap a single band: BandSet([band])")
        bands = tuple(bands)
        if not bands:
            raise InputError("BandSet needs at least one band")
        for i, b in enumerate(bands):
            if not isinstance(b, Band):
                raise InputError(f"BandSet element {i} is a {type(b).__name__}, not a Band")
        names = tuple(b.name for b in bands)
        dupes = sorted({n for n in names if names.count(n) > 1})
        if dupes:
            raise InputError(f"duplicate band name(s) {dupes}; give each band a unique name")
        self.bands = bands
        self.names = names
        self._index = {n: i for i, n in enumerate(names)}
        self.nu_ref_hz = _readonly([b.nu_ref_hz for b in bands])
        grid = np.unique(np.concatenate([b.nu_hz for b in bands]))
        weights = np.zeros((len(bands), grid.size))
        for i, b in enumerate(bands):  # loop over bands, not frequencies
            weights[i, np.searchsorted(grid, b.nu_hz)] = b.weights
        self.nu_grid_hz = _readonly(grid)
        self.weights = _readonly(weights)

    def band_fluxes(self, spectrum_on_grid: u.Quantity | ArrayLike) -> np.ndarray:
        """Quoted band fluxes of spectra sampled on :attr:`nu_grid_hz`.

        Parameters
        ----------
        spectrum_on_grid : array_like or Quantity, shape (..., n_grid)
            Flux densities (any linear unit) at the grid frequencies.

        Returns
        -------
        ndarray or Quantity, shape (..., n_bands)
            ``spectrum_on_grid @ weights.T``, in the unit of the input.

        Raises
        ------
        InputError
            If the last axis is not n_grid long.
        """
        unit = spectrum_on_grid.unit if isinstance(spectrum_on_grid, u.Quantity) else None
        # Quantity is Any to mypy, so the isinstance test above does not narrow the union
        s = np.asarray(spectrum_on_grid.value if unit is not None else spectrum_on_grid,  # type: ignore[union-attr]
                       dtype=float)
        if s.ndim == 0 or s.shape[-1] != self.nu_grid_hz.size:
            raise InputError(
                f"spectrum_on_grid must have last axis of length n_grid = "
                f"{self.nu_grid_hz.size} (BandSet.nu_grid_hz), got shape {s.shape}"
            )
        out = s @ self.weights.T
        return out * unit if unit is not None else out

    def color_correction(self, spectrum: Callable[[np.ndarray], np.ndarray]) -> np.ndarray:
        """Colour corrections K = F_quoted / S(nu_ref), one per band.

        Parameters
        ----------
        spectrum : callable
            ``f(nu_hz) -> ndarray`` with the frequency axis last, shape
            (..., n_nu) for ``nu_hz`` of shape (n_nu,).

        Returns
        -------
        ndarray, shape (..., n_bands)
            K per band. True monochromatic flux density at nu_ref =
            F_quoted / K.

        Raises
        ------
        InputError
            As :meth:`Band.color_correction`.
        """
        flux = _evaluate_spectrum(spectrum, np.array(self.nu_grid_hz), "nu_grid_hz") @ self.weights.T
        s_ref = _evaluate_spectrum(spectrum, np.array(self.nu_ref_hz), "nu_ref_hz")
        return _ratio_or_raise(flux, s_ref, self.names)

    def index(self, name: str) -> int:
        """Position of band ``name``; InputError naming the known bands if absent."""
        try:
            return self._index[name]
        except (KeyError, TypeError):
            raise InputError(
                f"no band named {name!r}; known bands: {', '.join(self.names)}"
            ) from None

    def subset(self, names: Sequence[str]) -> BandSet:
        """A new BandSet with the named bands, in the order given."""
        if isinstance(names, str):
            names = [names]
        return BandSet([self.bands[self.index(n)] for n in names])

    def __getitem__(self, key: int | str) -> Band:
        if isinstance(key, str):
            return self.bands[self.index(key)]
        if isinstance(key, numbers.Integral) and not isinstance(key, bool):
            if -len(self.bands) <= key < len(self.bands):
                return self.bands[key]
            raise InputError(f"band index {key} out of range for {len(self.bands)} bands")
        raise InputError(f"bands are indexed by name or integer, got {type(key).__name__}")

    def __len__(self) -> int:
        return len(self.bands)

    def __iter__(self) -> Iterator[Band]:
        return iter(self.bands)

    def __contains__(self, name: object) -> bool:
        return name in self._index

    def __repr__(self) -> str:
        return f"BandSet({list(self.names)}, n_grid={self.nu_grid_hz.size})"
