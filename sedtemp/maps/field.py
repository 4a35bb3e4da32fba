"""The modelled heating field of every pixel, and the per-pixel comparison with it.

A map field is described like a catalogue one, as a list of components
(``{"kind": ..., **arguments}``, see :func:`sedtemp.fields.build_field`),
with two additions for maps:

- a star may have a sky ``position`` (``{"ra": deg, "dec": deg}`` or a
  SkyCoord); its distance to each pixel is the projected separation
  d = D tan(theta), theta the angle between the star and the pixel centre
  from the output WCS (astropy SkyCoord) and D the distance to the cloud.
  As for catalogues, a separation on the sky is only a lower bound on the
  true distance, so T_eq is an upper bound there (``projected``);
- any argument may come from a map: ``<arg>_map`` (an image on any grid,
  reprojected onto the output grid), e.g. ``U_map`` for the ISRF strength,
  and ``A_V`` may be a map too.

:func:`compare_pixels` compares a whole tile in one vectorised call of
:func:`sedtemp.compare.compare_chunk`, which equals
:func:`sedtemp.compare.compare_draws` pixel by pixel with the same seeds.
"""

from __future__ import annotations

import os
from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING

import astropy.units as u
import numpy as np
from astropy.coordinates import SkyCoord
from astropy.io import fits

from ..compare import FLAGS, compare_chunk
from ..errors import InputError
from ..fields import build_field

if TYPE_CHECKING:
    from astropy.wcs import WCS

    from ..compare import Thresholds
    from ..compare.uncertainty import FieldUncertaintySpec
    from ..opacity import Opacity
    from ..radiation import RadiationField

__all__ = ["COMPARE_CODES", "FieldSpec", "compare_pixels", "pixel_fields"]

#: Integer code of each comparison flag in the COMPARE_FLAG map (0: not compared).
COMPARE_CODES = {name: i + 1 for i, name in enumerate(FLAGS)}
_FIELD_KEYS = {"components", "A_V", "distance", "uncertainty", "projected", "thresholds"}


def _is_image(value):
    return isinstance(value, (fits.PrimaryHDU, fits.ImageHDU, str, os.PathLike))


class FieldSpec:
    """A validated map field: constant arguments, map arguments and star positions.

    Parameters
    ----------
    spec : mapping
        ``components`` (list of mappings), optional ``A_V`` (number or image),
        ``distance`` (distance to the cloud: Quantity or bare pc; needed by
        star positions), ``uncertainty`` (fractional 1-sigma of the field
        strength), ``projected`` (default: True when a star has a position),
        ``thresholds`` (see :class:`sedtemp.compare.Thresholds`).

    Raises
    ------
    InputError
        Unknown key, no component, a position without a cloud distance, a
        component giving both ``arg`` and ``arg_map``.
    """

    def __init__(self, spec: Mapping) -> None:
        unknown = sorted(set(spec) - _FIELD_KEYS)
        if unknown:
            raise InputError(f"field: unknown key(s) {unknown}; known keys are {sorted(_FIELD_KEYS)}")
        comps = list(spec.get("components") or [])
        if not comps:
            raise InputError("field: give at least one component, e.g. {'kind': 'isrf', 'U': 1.0}")
        self.constant, self.maps, self.positions = [], {}, {}
        for i, comp in enumerate(comps):
            const = {}
            for key, value in dict(comp).items():
                if key == "position":
                    self.positions[i] = _position(value, i)
                elif key.endswith("_map"):
                    arg = key[:-4]
                    if arg in comp:
                        raise InputError(f"field component {i + 1}: give {arg!r} or {key!r}, not both")
                    self.maps[(i, arg)] = value
                else:
                    const[key] = value
            self.constant.append(const)
        av = spec.get("A_V", 0.0)
        self.A_V_map = av if _is_image(av) else None
        self.A_V = 0.0 if self.A_V_map is not None else float(av)
        dist = spec.get("distance")
        self.distance_m = None if dist is None else float(
            (dist if isinstance(dist, u.Quantity) else float(dist) * u.pc).to_value(u.m))
        if self.positions and self.distance_m is None:
            raise InputError("field: a star has a position, so the cloud's distance is needed to turn "
                             "angles into separations; add distance = '480 pc' (for example)")
        self.uncertainty = float(spec.get("uncertainty", 0.0) or 0.0)
        proj = spec.get("projected")
        self.projected = bool(self.positions) if proj is None else bool(proj)
        self.thresholds = spec.get("thresholds") or None

    def map_inputs(self) -> dict:
        """Images to reproject onto the output grid: key -> image (``"A_V"``, ``"<i>:<arg>"``)."""
        out = {f"{i}:{arg}": img for (i, arg), img in self.maps.items()}
        if self.A_V_map is not None:
            out["A_V"] = self.A_V_map
        return out


def _position(value, i):
    if isinstance(value, SkyCoord):
        return value.icrs
    if isinstance(value, Mapping) and set(value) == {"ra", "dec"}:
        return SkyCoord(float(value["ra"]) * u.deg, float(value["dec"]) * u.deg)
    raise InputError(f"field component {i + 1}: position must be {{ra, dec}} in deg or a SkyCoord, got {value!r}")


def _separations(spec: FieldSpec, wcs, ys, xs) -> dict:
    """Projected star-pixel separation (Quantity, pc) per positioned component."""
    if not spec.positions:
        return {}
    sky = wcs.pixel_to_world(xs, ys)
    out = {}
    for i, star in spec.positions.items():
        theta = sky.separation(star).to_value(u.rad)
        out[i] = (np.tan(theta) * spec.distance_m * u.m).to(u.pc)
    return out


def pixel_fields(spec: FieldSpec, wcs: WCS, ys: np.ndarray, xs: np.ndarray,
                 aux: Mapping) -> list[RadiationField | None]:
    """One field per pixel (``ys``, ``xs`` output-grid indices); None where a map value is missing.

    ``aux`` maps the keys of :meth:`FieldSpec.map_inputs` to the values at
    these pixels (already on the output grid).
    """
    seps = _separations(spec, wcs, ys, xs)
    av = np.asarray(aux["A_V"], float) if "A_V" in aux else np.full(len(ys), spec.A_V)
    out = []
    for k in range(len(ys)):
        comps, bad = [], not np.isfinite(av[k])
        for i, const in enumerate(spec.constant):
            c = dict(const)
            for (j, arg) in spec.maps:
                if j == i:
                    c[arg] = float(aux[f"{i}:{arg}"][k])
                    bad |= not np.isfinite(c[arg])
            if i in seps:
                c["distance"] = seps[i][k]
            comps.append(c)
        out.append(None if bad else _field_or_none(comps, av[k]))
    return out


def _field_or_none(comps, av):
    try:
        return build_field(comps, A_V=max(float(av), 0.0))
    except InputError:  # e.g. a pixel on the star itself (separation below the stellar radius)
        return None


def compare_pixels(T_draws: np.ndarray, beta_draws: np.ndarray, fields: Sequence[RadiationField | None],
                   opacity: Opacity, *, field_uncertainty: FieldUncertaintySpec = None, projected: bool = False,
                   thresholds: Thresholds | Mapping[str, float] | None = None,
                   fit_flags: Sequence[Sequence[str]] | None = None,
                   seeds: Sequence[int | np.random.SeedSequence | None] | None = None) -> dict:
    """Compare the (T, beta) draws of each pixel with its own field: one compare_chunk call per tile.

    Parameters
    ----------
    T_draws, beta_draws : ndarray (n_pixels, n_draws)
        Posterior draws (K; NaN beta: the opacity's own slope).
    fields : sequence of RadiationField or None (n_pixels,)
        None: no field there (the pixel is not compared).
    opacity : Opacity
    field_uncertainty, projected, thresholds : keyword-only
        As for :func:`sedtemp.compare.compare_draws`.
    fit_flags : sequence of tuple of str, optional, keyword-only
    seeds : sequence of int or SeedSequence (n_pixels,), keyword-only

    Returns
    -------
    dict of str -> ndarray (n_pixels,)
        ``T_eq_median``, ``T_eq_p16``, ``T_eq_p84`` (K), ``p_warmer``,
        ``ratio_median``, ``flag`` (int code of :data:`COMPARE_CODES`,
        0 = not compared).
    """
    n = T_draws.shape[0]
    keys = ("T_eq_median", "T_eq_p16", "T_eq_p84", "p_warmer", "ratio_median")
    out = {k: np.full(n, np.nan) for k in keys}
    out["flag"] = np.zeros(n, np.int16)
    idx = np.array([k for k in range(n) if fields[k] is not None and np.all(np.isfinite(T_draws[k]))], int)
    if idx.size == 0:
        return out
    beta = np.asarray(beta_draws, float)[idx]
    beta = np.where(np.isfinite(beta), beta, float(opacity.beta))  # NaN beta: the opacity's own slope
    seq = [_seed_sequence(None if seeds is None else seeds[k], k) for k in idx]
    # one vectorised call for the tile: equal pixel by pixel to compare_draws with the same seeds
    cols = compare_chunk(T_draws[idx], beta, [fields[k] for k in idx], opacity,
                         field_uncertainty=field_uncertainty, projected=projected, thresholds=thresholds,
                         fit_flags=None if fit_flags is None else [_flag_text(fit_flags[k]) for k in idx],
                         seeds=seq)
    for key in keys:
        out[key][idx] = np.asarray(cols[key], float)
    out["flag"][idx] = [COMPARE_CODES[str(f)] for f in cols["flag"]]
    return out


def _seed_sequence(seed, k):  # noqa: ARG001 - kept for a uniform call signature
    if isinstance(seed, np.random.SeedSequence):
        return seed
    return np.random.SeedSequence(0 if seed is None else int(seed))


def _flag_text(flags):
    return flags if isinstance(flags, str) else ",".join(flags or ())
