"""SED models: modified blackbodies evaluated for many parameter vectors at once.

Every model maps a parameter array ``theta`` of shape ``(n, n_params)``
(columns in ``param_names`` order; a 1-D ``theta`` is one vector) and an
array of observed-frame frequencies ``nu_obs_hz`` of shape ``(n_nu,)`` to the
observed flux density in W m^-2 Hz^-1, shape ``(n, n_nu)``. This is the hot
path of the MCMC, so every evaluation is a handful of broadcast numpy
expressions, never a loop over walkers or frequencies.

Amplitudes are always parameters in log10 of the physical amplitude
(``log10_mass``, ``log10_N_H2``, ``log10_tau0``). For models whose amplitude
multiplies the whole SED (``amplitude_name`` not ``None``),
``template_si`` gives the SED at amplitude 10**0 so that
``sed_si = 10**theta[:, amp] * template_si``; the likelihood uses this to
marginalise the amplitude analytically.

Models
------
- :class:`ModifiedBlackbody`: optically thin, amplitude a mass, an H2 column
  density per beam, or an optical depth.
- :class:`ThickModifiedBlackbody`: general opacity, S = Omega B (1 - e^-tau).
- :class:`TwoTemperatureModel`: sum of two thin components.

At redshift z the rest frequency is nu_obs (1+z), and the cosmic microwave
background heats the dust and is the background it is seen against, following
da Cunha et al. (2013).
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import astropy.units as u
import numpy as np
from numpy.typing import ArrayLike

from ._units import to_hz, to_si
from .cmb import (
    _check_redshift,
    _cmb_heated_si,
    _emission_si,
    cmb_contrast_factor,
    cmb_heated_temperature,
    cmb_temperature,
)
from .constants import DEFAULT_GAS_TO_DUST, M_HYDROGEN, M_SUN, T_CMB0
from .errors import InputError
from .opacity import SaturatedPowerLawOpacity
from .priors import LogUniformAmplitude, Prior, Uniform

if TYPE_CHECKING:
    from .opacity import Opacity

__all__ = [
    "MODELS",
    "M_HYDROGEN",
    "T_CMB0",
    "ModifiedBlackbody",
    "SEDModel",
    "ThickModifiedBlackbody",
    "TwoTemperatureModel",
    "cmb_contrast_factor",
    "cmb_heated_temperature",
    "cmb_temperature",
    "default_opacity",
    "get_model",
]

_M_SUN = M_SUN
_PER_CM2 = 1.0e4  # 1 cm^-2 in m^-2
_FLUX_SI = u.W / u.m**2 / u.Hz

#: Beckwith et al. (1990, AJ 99, 924) opacity, from memory:
#: kappa = 0.1 cm^2 g^-1 (nu / 1e12 Hz)^beta per gram of gas.
_BECKWITH_KAPPA_GAS = 0.1  # cm^2 g^-1
_BECKWITH_NU0 = 1.0e12  # Hz
#: Gas-to-dust mass ratio used to turn the Beckwith law into a per-dust
#: opacity (common practice for the Milky Way; sedtemp.constants).
_GAS_TO_DUST = DEFAULT_GAS_TO_DUST
#: Slope given to the default opacity objects; it only matters when the model
#: fixes beta to the opacity's own value (models pass their beta explicitly).
_DEFAULT_BETA = 2.0

_AMPLITUDES = {
    # kind: (parameter name, unit of the physical amplitude)
    "mass": ("log10_mass", "solMass"),
    "column": ("log10_N_H2", "cm-2"),
    "tau": ("log10_tau0", ""),
}
# Default amplitude priors on log10 of the amplitude (see default_prior docs).
_AMPLITUDE_RANGES = {"mass": (-8.0, 13.0), "column": (18.0, 26.0), "tau": (-12.0, 6.0)}
_T_RANGE = (3.0, 150.0)
_BETA_RANGE = (0.0, 4.0)
_THICK_TAU_RANGE = (-6.0, 3.0)


#: Grain radius (um) of the default opacity's UV cap (a typical big grain; common practice).
_DEFAULT_GRAIN_RADIUS_UM = 0.1


def default_opacity(per: str = "dust") -> SaturatedPowerLawOpacity:
    """The opacity used when a model is given ``opacity=None``.

    Parameters
    ----------
    per : {"dust", "gas"}
        ``"gas"``: the Beckwith et al. (1990) law kappa = 0.1 cm^2 g^-1
        (nu / 1 THz)^beta per unit gas mass. ``"dust"``: the same law per unit
        dust mass for a gas-to-dust ratio of 100, kappa = 10 cm^2 g^-1
        (nu / 1 THz)^beta.

    Returns
    -------
    SaturatedPowerLawOpacity
        With ``beta = 2`` (models with a free beta override it), capped at
        the geometric cross-section of 0.1 um grains of 3 g cm^-3. The cap
        lies shortward of ~5 um, so it changes nothing in far-IR fits, but it
        keeps the same opacity physical when the comparison stage uses it to
        absorb starlight: a bare nu^beta law extrapolated to the UV
        overestimates the absorbed power and so T_eq (36 K instead of ~18 K
        in the U = 1 field for beta = 1.8).

    References
    ----------
    Beckwith, S. V. W., Sargent, A. I., Chini, R. S., & Guesten, R. 1990, AJ,
    99, 924 (normalisation quoted from memory).
    """
    kappa = _BECKWITH_KAPPA_GAS * (_GAS_TO_DUST if per == "dust" else 1.0)
    return SaturatedPowerLawOpacity(kappa * u.cm**2 / u.g, _BECKWITH_NU0 * u.Hz, _DEFAULT_BETA,
                                    grain_radius=_DEFAULT_GRAIN_RADIUS_UM * u.um, per=per)


# ------------------------------------------------------------ input checking
def _positive_si(value, unit, default_unit, name):
    v = to_si(value, unit, default_unit=default_unit, name=name)
    if v.ndim != 0 or not (np.isfinite(v) and v > 0):
        raise InputError(f"{name} must be a single positive value, got {value!r}")
    return float(v)


def _fixed_beta(beta):
    if beta is None:
        return None
    b = float(beta)
    if not np.isfinite(b):
        raise InputError(f"beta must be None (free) or a finite number (fixed), got {beta!r}")
    return b


def _cmb_switches(redshift, cmb_heating, cmb_contrast, beta):
    on = redshift > 0.0
    heat = on if cmb_heating is None else bool(cmb_heating)
    contrast = on if cmb_contrast is None else bool(cmb_contrast)
    if heat and beta is not None and not beta > -4.0:
        raise InputError(f"CMB heating needs beta > -4 (the power 4 + beta), got beta={beta:g}")
    return heat, contrast


def _solid_angle_si(solid_angle, who):
    if solid_angle is None:
        raise InputError(
            f"{who} needs solid_angle (the beam or aperture, e.g. "
            "solid_angle=1.13 * (36 * u.arcsec)**2 or a value in sr)"
        )
    return _positive_si(solid_angle, u.sr, u.arcsec**2, "solid_angle")


# ------------------------------------------------------------------ the base
class SEDModel:
    """Base class of the SED models.

    Attributes
    ----------
    param_names : tuple of str
        Parameter names, the column order of ``theta``.
    param_units : dict
        Parameter name -> astropy unit string ("" for dimensionless). For a
        log10 amplitude it is the unit of the amplitude itself.
    amplitude_name : str or None
        The log10 parameter that multiplies the whole SED, or None.
    redshift : float
    """

    param_names: tuple = ()
    param_units: dict = {}  # noqa: RUF012 - a read-only table of the class
    amplitude_name: str | None = None
    redshift: float = 0.0

    def _theta(self, theta):
        """theta as a float array (n, n_params); a 1-D theta is one vector."""
        th = np.asarray(theta, dtype=float)
        if th.ndim == 1:
            th = th[None, :]
        k = len(self.param_names)
        if th.ndim != 2 or th.shape[1] != k:
            raise InputError(
                f"theta has shape {np.shape(theta)} but {type(self).__name__} has {k} "
                f"parameters {self.param_names}; pass an array of shape (n, {k})"
            )
        return th

    def _col(self, th, name):
        return th[:, self.param_names.index(name)][:, None]

    def sed_si(self, nu_obs_hz: ArrayLike, theta: ArrayLike) -> np.ndarray:  # pragma: no cover - abstract
        """Observed flux density (n, n_nu) in W m^-2 Hz^-1."""
        raise NotImplementedError

    def valid(self, theta: ArrayLike) -> np.ndarray:
        """True where a parameter vector is physical (finite, T > 0, ...); shape (n,)."""
        th = self._theta(theta)
        finite = np.ones(th.shape[0], bool)
        for j in range(th.shape[1]):  # a few parameters: columns, faster than an axis-1 reduction
            finite &= np.isfinite(th[:, j])
        return finite & self._valid_extra(th)

    def _valid_extra(self, th):
        return np.ones(th.shape[0], dtype=bool)

    def sed(self, nu: u.Quantity | ArrayLike, theta: ArrayLike) -> u.Quantity:
        """Observed flux density as a Quantity in Jy.

        Parameters
        ----------
        nu : Quantity or array_like, shape (n_nu,)
            Observed frequency or wavelength; a bare number is a wavelength
            in um.
        theta : array_like, shape (n, n_params) or (n_params,)
            Parameters in ``param_names`` order (units in ``param_units``).

        Returns
        -------
        Quantity, shape (n, n_nu)
            Flux density in Jy.
        """
        nu_hz = np.atleast_1d(to_hz(nu, name="nu"))
        return (self.sed_si(nu_hz, theta) * _FLUX_SI).to(u.Jy)

    def default_prior(self) -> Prior:  # pragma: no cover - abstract
        raise NotImplementedError


# ------------------------------------------------- shared by one-T models
class _OneTemperature(SEDModel):
    """Pieces shared by the single-temperature models (T, beta, CMB heating)."""

    beta: float | None = None
    cmb_heating: bool = False

    def _beta_of(self, th):
        return self._col(th, "beta") if self.beta is None else self.beta

    def _t_dust_si(self, th):
        t = self._col(th, "T")
        return _cmb_heated_si(t, self._beta_of(th), self.redshift) if self.cmb_heating else t

    def dust_temperature(self, theta: ArrayLike) -> u.Quantity:
        """Dust temperature T_d(z) including CMB heating when it is on.

        Parameters
        ----------
        theta : array_like, shape (n, n_params) or (n_params,)

        Returns
        -------
        Quantity, shape (n,)
            T_d in K (da Cunha et al. 2013 eq. 12); equal to ``T`` when
            ``cmb_heating`` is off.
        """
        return self._t_dust_si(self._theta(theta))[:, 0] * u.K

    def _valid_extra(self, th):
        ok = self._col(th, "T")[:, 0] > 0
        if self.cmb_heating:
            ok &= np.broadcast_to(4.0 + np.asarray(self._beta_of(th)), (th.shape[0], 1))[:, 0] > 0
        return ok


# --------------------------------------------------------- thin: the workhorse
class ModifiedBlackbody(_OneTemperature):
    """Optically thin modified blackbody.

    Parameters
    ----------
    opacity : Opacity, optional
        Dust opacity. Default :func:`default_opacity` (Beckwith et al. 1990),
        per dust mass for ``amplitude="mass"`` and ``"tau"``, per gas mass for
        ``amplitude="column"``.
    amplitude : {"mass", "column", "tau"}, keyword-only
        ``"mass"``: parameter ``log10_mass`` in solMass, the dust mass if the
        opacity is per dust mass and the *gas* mass if it is per gas mass.
        ``"column"``: ``log10_N_H2`` in cm^-2, per beam; needs an opacity per
        gas mass. ``"tau"``: ``log10_tau0``, the optical depth at the
        opacity's reference frequency ``nu0``.
    distance : Quantity or float, optional, keyword-only
        Luminosity distance for ``amplitude="mass"`` (bare: pc). Required at
        z = 0; at z > 0 it defaults to the Planck18 luminosity distance.
    redshift : float, keyword-only
        Redshift z >= 0. Default 0.
    solid_angle : Quantity or float, optional, keyword-only
        Beam or aperture solid angle for ``"column"`` and ``"tau"`` (bare:
        arcsec^2).
    beta : float or None, keyword-only
        None (default): beta is the free parameter ``"beta"``. A number fixes
        it and removes the parameter.
    cmb_heating, cmb_contrast : bool or None, keyword-only
        Include CMB heating (the parameter ``T`` is then the temperature the
        dust would have at z = 0, without the extra heating by the warmer CMB
        at z; see :func:`cmb_heated_temperature`) and the CMB background the
        dust is seen against. None (default): both on when ``redshift > 0``,
        both off at z = 0 (Galactic maps usually have the CMB removed).
    mean_molecular_weight : float, keyword-only
        mu_H2, mass per H2 molecule in units of m_H (``"column"`` only).
        Default 2.8 (Kauffmann et al. 2008, from memory).
    nu0 : Quantity or float, optional, keyword-only
        Reference frequency of ``tau0`` (``"tau"`` only; bare: Hz). Default
        the opacity's ``nu0``; required for an opacity without one.

    Raises
    ------
    InputError
        Unknown amplitude kind, missing distance or solid angle, an opacity
        per dust mass with ``"column"``, a non-positive or misplaced option.

    Notes
    -----
    With nu = nu_obs (1+z), T_d the (CMB-heated) dust temperature and
    B~ = B_nu(T_d) - B_nu(T_CMB(z)) with the CMB contrast (else B_nu(T_d)):

    - mass:   S = (1+z) M kappa(nu) B~ / D_L^2
    - column: S = Omega mu_H2 m_H N(H2) kappa_gas(nu) B~ / (1+z)^3
    - tau:    S = Omega tau0 [kappa(nu) / kappa(nu0)] B~ / (1+z)^3,
      which is Omega tau0 (nu/nu0)^beta B~ for a power-law opacity.

    The (1+z)^-3 is the cosmological dimming of surface brightness for the
    observed solid angle Omega (1 at z = 0).

    References
    ----------
    da Cunha, E., et al. 2013, ApJ, 766, 13 (eqs. 12 and 18, from memory).
    Hildebrand, R. H. 1983, QJRAS, 24, 267 (thin dust mass).
    Kauffmann, J., et al. 2008, A&A, 487, 993 (mu_H2 = 2.8, from memory).
    """

    def __init__(self, opacity: Opacity | None = None, *, amplitude: str = "mass",
                 distance: u.Quantity | float | None = None, redshift: float = 0.0,
                 solid_angle: u.Quantity | float | None = None, beta: float | None = None,
                 cmb_heating: bool | None = None, cmb_contrast: bool | None = None,
                 mean_molecular_weight: float = 2.8, nu0: u.Quantity | float | None = None) -> None:
        if amplitude not in _AMPLITUDES:
            raise InputError(f"amplitude must be one of {list(_AMPLITUDES)}, got {amplitude!r}")
        self.amplitude = amplitude
        self.redshift = _check_redshift(redshift)
        if opacity is None:
            opacity = default_opacity("gas" if amplitude == "column" else "dust")
        self.opacity = opacity
        self.beta = _fixed_beta(beta)
        self.cmb_heating, self.cmb_contrast = _cmb_switches(
            self.redshift, cmb_heating, cmb_contrast, self.beta)
        self.distance_m = None
        self.solid_angle_sr = None
        self.nu0_hz = None
        self.mean_molecular_weight = float(mean_molecular_weight)
        self._scale = self._amplitude_scale(distance, solid_angle, mean_molecular_weight, nu0)
        amp, amp_unit = _AMPLITUDES[amplitude]
        self.amplitude_name = amp
        self.param_names = (amp, "T") + (("beta",) if self.beta is None else ())
        units = {amp: amp_unit, "T": "K", "beta": ""}
        self.param_units = {n: units[n] for n in self.param_names}

    def _amplitude_scale(self, distance, solid_angle, mu, nu0):
        """SI factor turning kappa B~ (or the tau shape) into S for amplitude 1."""
        kind, z = self.amplitude, self.redshift
        if kind == "mass":
            if solid_angle is not None:
                raise InputError("solid_angle is used only with amplitude='column' or 'tau'; "
                                 "with amplitude='mass' give distance")
            self.distance_m = self._luminosity_distance(distance)
            return (1.0 + z) * _M_SUN / self.distance_m**2
        if distance is not None:
            raise InputError(f"distance is used only with amplitude='mass', not {kind!r}; "
                             "give solid_angle instead")
        self.solid_angle_sr = _solid_angle_si(solid_angle, f"amplitude={kind!r}")
        dimming = (1.0 + z) ** -3
        if kind == "column":
            if self.opacity.per != "gas":
                raise InputError(
                    "amplitude='column' needs an opacity per gas mass (per='gas'), got one per "
                    f"{self.opacity.per} mass; build it with per='gas' (kappa_dust / gas-to-dust ratio)"
                )
            mu = self.mean_molecular_weight
            if not (np.isfinite(mu) and mu > 0):
                raise InputError(f"mean_molecular_weight must be positive, got {mu!r}")
            return self.solid_angle_sr * mu * M_HYDROGEN * _PER_CM2 * dimming
        self.nu0_hz = _tau_reference(self.opacity, nu0)
        return self.solid_angle_sr * dimming

    def _luminosity_distance(self, distance):
        if distance is not None:
            return _positive_si(distance, u.m, u.pc, "distance")
        if self.redshift == 0.0:
            raise InputError(
                "amplitude='mass' at redshift 0 needs distance (e.g. distance=140 * u.pc; "
                "a bare number is in pc)"
            )
        from astropy.cosmology import (
            Planck18,  # reference cosmology, loaded only when needed
        )

        return float(Planck18.luminosity_distance(self.redshift).to_value(u.m))

    def template_si(self, nu_obs_hz: ArrayLike, theta: ArrayLike) -> np.ndarray:
        """Observed flux density (n, n_nu) in W m^-2 Hz^-1 at amplitude 10**0.

        The amplitude column of ``theta`` is ignored.
        """
        th = self._theta(theta)
        nu = np.asarray(nu_obs_hz, dtype=float) * (1.0 + self.redshift)
        beta = self._beta_of(th)
        kappa = self.opacity.kappa_si(nu, beta=beta)
        if self.amplitude == "tau":
            kappa = kappa / self.opacity.kappa_si(self.nu0_hz, beta=beta)
        emission = _emission_si(nu, self._t_dust_si(th), self.redshift, self.cmb_contrast)
        return self._scale * kappa * emission

    def sed_si(self, nu_obs_hz: ArrayLike, theta: ArrayLike) -> np.ndarray:
        """Observed flux density (n, n_nu) in W m^-2 Hz^-1 (see class Notes)."""
        th = self._theta(theta)
        return 10.0 ** self._col(th, self.amplitude_name) * self.template_si(nu_obs_hz, th)

    def default_prior(self) -> Prior:
        """Default priors, uniform in every parameter.

        - ``T``: Uniform(3, 150) K: from just above T_CMB0 to dust whose
          emission peaks near 20 um, the short end of far-infrared bands.
        - ``beta`` (if free): Uniform(0, 4), wide enough to show the T-beta
          degeneracy instead of imposing a population value; pass a Gaussian
          (e.g. around 1.6-1.8) to add that information.
        - amplitude: :class:`~sedtemp.priors.LogUniformAmplitude`, uniform in
          the log10 of the amplitude between ``log10_mass`` in [-8, 13] (dust
          of a small core to the gas of a massive galaxy), ``log10_N_H2`` in
          [18, 26] (diffuse ISM to protostellar cores), ``log10_tau0`` in
          [-12, 6] (wide, since the default model's 1 arcsec^2 solid angle is
          nominal). A scale-invariant amplitude prior does not bias T: a prior
          uniform in the linear amplitude favours cold, massive solutions
          (a 12 K source came out at 10.3 K at fixed survey depth). The grid
          and the MCMC marginalise either prior exactly; pass
          ``UniformAmplitude`` to use the linear one.
        """
        amp = self.amplitude_name
        priors = {amp: LogUniformAmplitude(*_AMPLITUDE_RANGES[self.amplitude]), "T": Uniform(*_T_RANGE)}
        if self.beta is None:
            priors["beta"] = Uniform(*_BETA_RANGE)
        return Prior(priors)

    def __repr__(self) -> str:
        where = (f"distance={self.distance_m / u.pc.to(u.m):.6g} pc" if self.distance_m
                 else f"solid_angle={self.solid_angle_sr:.6g} sr")
        beta = "free" if self.beta is None else f"{self.beta:g}"
        return (f"{type(self).__name__}(amplitude={self.amplitude!r}, {where}, "
                f"redshift={self.redshift:g}, beta={beta}, cmb_heating={self.cmb_heating}, "
                f"cmb_contrast={self.cmb_contrast}, opacity={self.opacity!r})")


def _tau_reference(opacity, nu0):
    if nu0 is not None:
        return _positive_si(nu0, u.Hz, u.Hz, "nu0")
    ref = getattr(opacity, "nu0_hz", None)
    if ref is None:
        raise InputError(
            f"the opacity {type(opacity).__name__} has no reference frequency nu0; "
            "give nu0= (the frequency at which tau0 is stated)"
        )
    return float(ref)


# ------------------------------------------------------- thick: general opacity
class ThickModifiedBlackbody(_OneTemperature):
    """Modified blackbody of any optical depth.

    Parameters
    ----------
    opacity : Opacity, optional
        Sets the frequency dependence of tau (its normalisation cancels).
        Default :func:`default_opacity`.
    solid_angle : Quantity or float, keyword-only
        Solid angle of the emitting region (bare: arcsec^2). Required.
    redshift : float, keyword-only
    beta : float or None, keyword-only
        None (default): free parameter ``"beta"``; a number fixes it.
    cmb_heating, cmb_contrast : bool or None, keyword-only
        As for :class:`ModifiedBlackbody` (default: on when z > 0).
    nu0 : Quantity or float, optional, keyword-only
        Reference frequency of ``tau0`` (bare: Hz); default the opacity's.

    Notes
    -----
    S = Omega B~ (1 - exp(-tau_nu)) / (1+z)^3, tau_nu = tau0 kappa(nu)/kappa(nu0)
    (= tau0 (nu/nu0)^beta for a power law), nu = nu_obs (1+z), B~ as in
    :class:`ModifiedBlackbody`. 1 - exp(-tau) is computed as -expm1(-tau),
    exact for tau << 1. The CMB heating formula of da Cunha et al. (2013)
    assumes thin emission; here it is applied unchanged with the model's beta
    (an approximation for tau >~ 1). Parameters: ``log10_tau0``, ``T``
    (``beta``). Not linear in an amplitude: ``amplitude_name`` is None.
    """

    def __init__(self, opacity: Opacity | None = None, *, solid_angle: u.Quantity | float,
                 redshift: float = 0.0, beta: float | None = None, cmb_heating: bool | None = None,
                 cmb_contrast: bool | None = None, nu0: u.Quantity | float | None = None) -> None:
        self.redshift = _check_redshift(redshift)
        self.opacity = default_opacity("dust") if opacity is None else opacity
        self.beta = _fixed_beta(beta)
        self.cmb_heating, self.cmb_contrast = _cmb_switches(
            self.redshift, cmb_heating, cmb_contrast, self.beta)
        self.solid_angle_sr = _solid_angle_si(solid_angle, "ThickModifiedBlackbody")
        self.nu0_hz = _tau_reference(self.opacity, nu0)
        self._scale = self.solid_angle_sr * (1.0 + self.redshift) ** -3
        self.amplitude_name = None
        self.param_names = ("log10_tau0", "T") + (("beta",) if self.beta is None else ())
        units = {"log10_tau0": "", "T": "K", "beta": ""}
        self.param_units = {n: units[n] for n in self.param_names}

    def optical_depth(self, nu_obs_hz: ArrayLike, theta: ArrayLike) -> np.ndarray:
        """tau at the rest frequency of each observed frequency, shape (n, n_nu)."""
        th = self._theta(theta)
        nu = np.asarray(nu_obs_hz, dtype=float) * (1.0 + self.redshift)
        beta = self._beta_of(th)
        shape = self.opacity.kappa_si(nu, beta=beta) / self.opacity.kappa_si(self.nu0_hz, beta=beta)
        return 10.0 ** self._col(th, "log10_tau0") * shape

    def sed_si(self, nu_obs_hz: ArrayLike, theta: ArrayLike) -> np.ndarray:
        """Observed flux density (n, n_nu) in W m^-2 Hz^-1 (see class Notes)."""
        th = self._theta(theta)
        nu = np.asarray(nu_obs_hz, dtype=float) * (1.0 + self.redshift)
        tau = self.optical_depth(nu_obs_hz, th)
        emission = _emission_si(nu, self._t_dust_si(th), self.redshift, self.cmb_contrast)
        return self._scale * emission * -np.expm1(-tau)

    def default_prior(self) -> Prior:
        """T Uniform(3, 150) K, beta Uniform(0, 4), log10_tau0 Uniform(-6, 3)."""
        priors = {"log10_tau0": Uniform(*_THICK_TAU_RANGE), "T": Uniform(*_T_RANGE)}
        if self.beta is None:
            priors["beta"] = Uniform(*_BETA_RANGE)
        return Prior(priors)

    def __repr__(self) -> str:
        beta = "free" if self.beta is None else f"{self.beta:g}"
        return (f"ThickModifiedBlackbody(solid_angle={self.solid_angle_sr:.6g} sr, "
                f"redshift={self.redshift:g}, nu0={self.nu0_hz:.6g} Hz, beta={beta}, "
                f"cmb_heating={self.cmb_heating}, cmb_contrast={self.cmb_contrast}, "
                f"opacity={self.opacity!r})")


# ---------------------------------------------------------- two temperatures
class TwoTemperatureModel(SEDModel):
    """Sum of a cold and a warm optically thin component.

    Parameters
    ----------
    cold, warm : ModifiedBlackbody, optional
        The components, with the same amplitude kind and redshift. If both
        are omitted, two identical components are built from the keywords.
    redshift : float, optional, keyword-only
        With explicit components: must equal theirs (checked). Without: the
        components' redshift (default 0).
    opacity, amplitude, distance, solid_angle, beta : keyword-only
        Options of the two :class:`ModifiedBlackbody` components built when
        ``cold`` and ``warm`` are omitted (as a workflow's ``[model]`` gives them).

    Notes
    -----
    Parameters ``<amp>_cold, T_cold, <amp>_warm, T_warm`` (``<amp>`` the
    components' amplitude name, e.g. ``log10_mass``), then ``beta`` if either
    component has a free beta: one shared ``beta`` feeds every component whose
    beta is free (a component with a fixed beta keeps it). :meth:`valid`
    enforces T_warm > T_cold, which removes the label-switching symmetry.
    ``amplitude_name`` is None (two amplitudes).

    Raises
    ------
    InputError
        If a component is not a ModifiedBlackbody, or the amplitude kinds or
        redshifts differ.
    """

    def __init__(self, cold: ModifiedBlackbody | None = None, warm: ModifiedBlackbody | None = None, *,
                 redshift: float | None = None, opacity: Opacity | None = None, amplitude: str = "mass",
                 distance: u.Quantity | float | None = None, solid_angle: u.Quantity | float | None = None,
                 beta: float | None = None) -> None:
        if cold is None and warm is None:
            opts: dict[str, Any] = {"opacity": opacity, "amplitude": amplitude, "distance": distance,
                                    "solid_angle": solid_angle,
                                    "redshift": 0.0 if redshift is None else redshift, "beta": beta}
            cold, warm = ModifiedBlackbody(**opts), ModifiedBlackbody(**opts)
        elif cold is None or warm is None:
            raise InputError("TwoTemperatureModel: give both cold= and warm= components, or neither "
                             "(then both are built from opacity=, amplitude=, distance=, ...)")
        elif redshift is not None and _check_redshift(redshift) != cold.redshift:
            raise InputError(f"TwoTemperatureModel: redshift={redshift!r} differs from the components' "
                             f"{cold.redshift:g}; drop redshift= or build the components at it")
        for name, comp in (("cold", cold), ("warm", warm)):
            if not isinstance(comp, ModifiedBlackbody):
                raise InputError(f"TwoTemperatureModel: {name} must be a ModifiedBlackbody, got {comp!r}")
        if cold.amplitude != warm.amplitude:
            raise InputError(
                f"TwoTemperatureModel: components have different amplitude kinds "
                f"(cold {cold.amplitude!r}, warm {warm.amplitude!r}); use the same for both"
            )
        if cold.redshift != warm.redshift:
            raise InputError(
                f"TwoTemperatureModel: components have different redshifts "
                f"(cold {cold.redshift:g}, warm {warm.redshift:g})"
            )
        self.cold, self.warm = cold, warm
        self.redshift = cold.redshift
        amp = cold.amplitude_name
        free_beta = cold.beta is None or warm.beta is None
        names = (f"{amp}_cold", "T_cold", f"{amp}_warm", "T_warm") + (("beta",) if free_beta else ())
        self.param_names = names
        self.amplitude_name = None
        au = cold.param_units[amp]
        units = {f"{amp}_cold": au, "T_cold": "K", f"{amp}_warm": au, "T_warm": "K", "beta": ""}
        self.param_units = {n: units[n] for n in names}
        self._idx = {"cold": self._component_columns(cold, "cold"),
                     "warm": self._component_columns(warm, "warm")}

    def _component_columns(self, comp, label):
        amp = comp.amplitude_name
        cols = [self.param_names.index(f"{amp}_{label}"), self.param_names.index(f"T_{label}")]
        if comp.beta is None:
            cols.append(self.param_names.index("beta"))
        return np.array(cols)

    def split(self, theta: ArrayLike) -> tuple[np.ndarray, np.ndarray]:
        """theta (n, n_params) -> (theta_cold, theta_warm) in each component's order."""
        th = self._theta(theta)
        return th[:, self._idx["cold"]], th[:, self._idx["warm"]]

    def sed_si(self, nu_obs_hz: ArrayLike, theta: ArrayLike) -> np.ndarray:
        """Observed flux density (n, n_nu) in W m^-2 Hz^-1: cold + warm."""
        tc, tw = self.split(theta)
        return self.cold.sed_si(nu_obs_hz, tc) + self.warm.sed_si(nu_obs_hz, tw)

    def valid(self, theta: ArrayLike) -> np.ndarray:
        """Both components valid and T_warm > T_cold; shape (n,)."""
        th = self._theta(theta)
        tc, tw = self.split(th)
        t_cold = th[:, self.param_names.index("T_cold")]
        t_warm = th[:, self.param_names.index("T_warm")]
        return self.cold.valid(tc) & self.warm.valid(tw) & (t_warm > t_cold)

    def default_prior(self) -> Prior:
        """The components' defaults for each amplitude and T (T_warm > T_cold via :meth:`valid`)."""
        pc, pw = self.cold.default_prior(), self.warm.default_prior()
        amp = self.cold.amplitude_name
        priors = {f"{amp}_cold": pc[amp], "T_cold": pc["T"], f"{amp}_warm": pw[amp], "T_warm": pw["T"]}
        if "beta" in self.param_names:
            priors["beta"] = Uniform(*_BETA_RANGE)
        return Prior(priors)

    def __repr__(self) -> str:
        return f"TwoTemperatureModel(cold={self.cold!r}, warm={self.warm!r})"


# ----------------------------------------------------------------- registry
#: Registered model names, for workflow files.
MODELS = {
    "thin": ModifiedBlackbody,
    "thick": ThickModifiedBlackbody,
    "two_temperature": TwoTemperatureModel,
}


def get_model(name: str) -> type[SEDModel]:
    """The model class registered under ``name`` (a key of :data:`MODELS`).

    Raises
    ------
    InputError
        Unknown name (the message lists the choices).

    Examples
    --------
    >>> get_model("thin").__name__
    'ModifiedBlackbody'
    """
    cls = MODELS.get(name) if isinstance(name, str) else None
    if cls is None:
        raise InputError(f"unknown model {name!r}; choose one of {sorted(MODELS)}")
    return cls
