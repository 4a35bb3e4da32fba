"""Absorbed power of many sources at once: each shared spectrum is integrated once.

The absorbed power per unit mass of source i is

    P_i(beta) = sum_c s_ic 4 pi int kappa_nu(beta) J_c,nu exp(-tau_nu A_V,ic) dnu,

where J_c is a *unit* spectrum shared by many sources (``ISRF(U) = U x
ISRF(1)``, a star or the CMB = dilution x B_nu(T), a table) and s_ic the
source's scale (:meth:`sedtemp.radiation.RadiationField.unit_spectrum`).
:func:`absorbed_power_chunk` integrates each unit spectrum against kappa on a
set of beta nodes in one matrix product, the per-source extinctions of one
curve in a second one (the matrix exp(-tau_nu A_V) of the chunk's distinct
A_V values), and interpolates in beta; the scales multiply afterwards. No
loop runs over sources or frequencies in the numerics.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Literal, overload

import numpy as np
from numpy.typing import ArrayLike

from ._numerics import log_trapezoid_weights
from ._units import to_hz
from .constants import NU_LYMAN
from .errors import InputError
from .radiation import AttenuatedField, RadiationField, ScaledField

if TYPE_CHECKING:
    import astropy.units as u

    from .opacity import Opacity

__all__ = [
    "BETA_NODE_STEP",
    "DEFAULT_NU_GRID_HZ",
    "EXTRAPOLATION_WARN_FRACTION",
    "Term",
    "absorbed_power_and_reference",
    "absorbed_power_chunk",
    "decompose",
    "frequency_grid",
    "warn_extrapolated",
]

#: Default absorption grid: 4001 log-spaced frequencies from 1e9 Hz (30 cm) to
#: the Lyman limit (13.6 eV), where the ISRF stops; trapezoid rule in ln nu.
DEFAULT_NU_GRID_HZ = np.geomspace(1e9, NU_LYMAN, 4001)
#: Spacing of the beta nodes (multiples of it, so a beta is interpolated from
#: the same four nodes whatever the chunk): 4-point Lagrange in beta of ln P is
#: accurate to ~1e-9 relative where ln P(beta) is smooth, and to ~1e-5 where a UV
#: cap's break crosses a jump of the field spectrum (the Lyman edge, MMP83 joints).
BETA_NODE_STEP = 0.01
_DIRECT_MAX = 16  # up to this many distinct betas, the power is integrated at each directly


def frequency_grid(nu_grid: u.Quantity | ArrayLike | None = None) -> tuple[np.ndarray, np.ndarray]:
    """(nu in Hz, weights w with sum(w f) ~= int f dnu) of a grid; ``None``: :data:`DEFAULT_NU_GRID_HZ`."""
    if nu_grid is None:
        nu = DEFAULT_NU_GRID_HZ
    else:
        import astropy.units as u

        nu = np.asarray(to_hz(nu_grid, default_unit=u.Hz, name="nu_grid"), float)
    if nu.ndim != 1 or nu.size < 3 or not np.all(np.diff(nu) > 0) or not nu[0] > 0:
        raise InputError("nu_grid must be a 1-D increasing array of >= 3 positive frequencies (Hz)")
    return nu, log_trapezoid_weights(nu)


@dataclass(frozen=True)
class Term:
    """One field component as a unit spectrum times a scale, behind an extinction."""

    key: tuple
    unit: RadiationField
    scale: float
    A_V: float
    curve: object  # ExtinctionCurve or None


def decompose(component: RadiationField) -> Term:
    """The :class:`Term` of one field component (attenuation and scale wrappers peeled off)."""
    a_v, curve, factor, inner = 0.0, None, 1.0, component
    while isinstance(inner, (AttenuatedField, ScaledField)):
        if isinstance(inner, ScaledField):
            factor *= inner.factor
        else:
            if curve is not None and inner.curve.key != curve.key:  # two different curves: opaque
                return Term(("object", id(component)), component, 1.0, 0.0, None)
            a_v, curve = a_v + inner.A_V, inner.curve
        inner = inner.field
    key, unit, scale = inner.unit_spectrum()
    return Term(key, unit, float(scale) * factor, a_v, curve if a_v > 0 else None)


def _beta_nodes(b):
    """Nodes for the betas ``b`` and how to use them: ('direct', uniq, inverse) or ('lagrange', nodes, k0)."""
    # a few draws with more than _DIRECT_MAX distinct values decide without sorting them all
    if np.unique(b.ravel()[:4 * _DIRECT_MAX]).size <= _DIRECT_MAX:
        uniq, inv = np.unique(b, return_inverse=True)
        if uniq.size <= _DIRECT_MAX:
            return "direct", uniq, inv.reshape(b.shape)
    k_lo = int(np.floor(b.min() / BETA_NODE_STEP)) - 2
    k_hi = int(np.ceil(b.max() / BETA_NODE_STEP)) + 2
    return "lagrange", BETA_NODE_STEP * np.arange(k_lo, k_hi + 1), k_lo


#: Per-process caches of the opacity rows 4 pi kappa_nu(beta) w_nu on a frequency
#: grid (one row per beta node) and of unit spectra on a grid: both depend on
#: the opacity, grid and field only, so every chunk of a run reuses them.
_KW_CACHE: dict = {}
_J_CACHE: dict = {}
_KW_MATRICES: dict = {}
_KW_MAX_ROWS = 4096  # ~130 MB of rows on the default grid at most
_J_MAX = 256


def _opacity_key(opacity):
    return opacity.cache_key() if hasattr(opacity, "cache_key") else ("object",)


def _grid_key(nu):
    return (nu.size, float(nu[0]), float(nu[-1]), hash(nu.tobytes()))


def _kappa_rows(opacity, nodes, nu, w):
    """4 pi kappa_nu(beta) w_nu (n_nodes, n_nu), rows computed once per (opacity, grid, beta) and process."""
    okey = _opacity_key(opacity)
    if okey[0] == "object":  # keyed by identity: an id can be reused after the object is freed
        return 4 * np.pi * opacity.kappa_si(nu[None, :], nodes[:, None]) * w
    key = (okey, _grid_key(nu))
    mkey = (*key, nodes.tobytes())
    mat = _KW_MATRICES.get(mkey)
    if mat is not None:  # the same node set as an earlier chunk: the stacked rows as they were
        return mat
    rows = _KW_CACHE.setdefault(key, {})
    missing = [b for b in nodes.tolist() if b not in rows]
    if missing:
        if sum(len(r) for r in _KW_CACHE.values()) + len(missing) > _KW_MAX_ROWS:
            _KW_CACHE.clear()
            rows = _KW_CACHE.setdefault(key, {})
            missing = nodes.tolist()
        mb = np.asarray(missing, float)
        new = 4 * np.pi * opacity.kappa_si(nu[None, :], mb[:, None]) * w
        rows.update(zip(missing, new, strict=True))
    mat = np.stack([rows[b] for b in nodes.tolist()])
    if len(_KW_MATRICES) >= 16:
        _KW_MATRICES.pop(next(iter(_KW_MATRICES)))
    _KW_MATRICES[mkey] = mat
    return mat


def _unit_spectrum(unit, key, nu):
    """J_nu of a unit spectrum on the grid (SI), cached per (spectrum key, grid) and process."""
    if key[0] == "object":  # keyed by identity (see _kappa_rows)
        return np.asarray(unit.mean_intensity_si(nu), float)
    ck = (key, _grid_key(nu))
    j = _J_CACHE.get(ck)
    if j is None:
        if len(_J_CACHE) >= _J_MAX:
            _J_CACHE.clear()
        j = _J_CACHE[ck] = np.asarray(unit.mean_intensity_si(nu), float)
    return j


#: Per-process cache of unit-spectrum columns on the Lagrange beta nodes (fixed
#: multiples of BETA_NODE_STEP, so chunks share them): (opacity, grid, spectrum,
#: extrapolation limit) -> (index of the first node, powers, powers above the limit).
_COLUMNS: dict = {}
_COLUMNS_MAX = 256


def _node_powers(opacity, js, k_a, k_b, nu, w, nu_extrap):
    """Unit powers (n, len(js)) of the spectra ``js`` on Lagrange nodes k_a .. k_b, and above nu_extrap (or None)."""
    kw = _kappa_rows(opacity, BETA_NODE_STEP * np.arange(k_a, k_b + 1), nu, w)
    jmat = np.stack(js, axis=1)
    if nu_extrap is None:
        return kw @ jmat, None
    # both in one product: the rows of kw (the larger operand) are read once
    both = kw @ np.concatenate([jmat, jmat * (nu > nu_extrap)[:, None]], axis=1)
    return both[:, :len(js)], both[:, len(js):]


def _extended(old, left, right, c):
    """A cached column (first node, powers, powers above the limit or None) with column ``c`` of the
    new nodes' powers (``_node_powers`` results, or None) joined on either side."""
    first, vals, above = old
    before, after = ([] if left is None else [left]), ([] if right is None else [right])
    if left is not None:
        first -= left[0].shape[0]
    vals = np.concatenate([x[0][:, c] for x in before] + [vals] + [x[0][:, c] for x in after])
    if above is not None:  # then the new nodes have their part above the limit too
        above = np.concatenate([x[1][:, c] for x in before] + [above] + [x[1][:, c] for x in after])
    return first, vals, above


def _node_columns(opacity, specs, k_lo, n_nodes, nu, w, nu_extrap):
    """Columns (n_nodes, n_specs) of unit powers on Lagrange nodes k_lo .. k_lo + n_nodes - 1, and above nu_extrap.

    ``specs`` are (spectrum key, J on the grid) of unextinguished unit spectra
    with value keys. A column is integrated once per process over the node
    range seen so far and extended (the new nodes only, one matrix product for
    the columns that share a range) when a chunk's betas go beyond it, so
    later chunks only index and a node's value never changes.
    """
    gkey = (_opacity_key(opacity), _grid_key(nu), nu_extrap)
    k_hi = k_lo + n_nodes - 1
    got: dict = {key: _COLUMNS.get((gkey, key)) for key, _ in specs}
    stale: dict = {}  # cached range (first node, count) or None -> the columns to extend or make
    for key, j in specs:
        have = got[key]
        if have is None or have[0] > k_lo or have[0] + have[1].size - 1 < k_hi:
            stale.setdefault(None if have is None else (have[0], have[1].size), []).append((key, j))
    if stale and len(_COLUMNS) + sum(map(len, stale.values())) > _COLUMNS_MAX:
        _COLUMNS.clear()
    for span, members in stale.items():
        js = [j for _, j in members]
        if span is None:
            new = _node_powers(opacity, js, k_lo, k_hi, nu, w, nu_extrap)
            for c, (key, _) in enumerate(members):
                got[key] = (k_lo, new[0][:, c].copy(), None if new[1] is None else new[1][:, c].copy())
        else:
            k0, k1 = span[0], span[0] + span[1] - 1
            left = _node_powers(opacity, js, k_lo, k0 - 1, nu, w, nu_extrap) if k_lo < k0 else None
            right = _node_powers(opacity, js, k1 + 1, k_hi, nu, w, nu_extrap) if k_hi > k1 else None
            for c, (key, _) in enumerate(members):
                got[key] = _extended(got[key], left, right, c)
        for key, _ in members:
            _COLUMNS[(gkey, key)] = got[key]
    rows = [slice(k_lo - got[key][0], k_lo - got[key][0] + n_nodes) for key, _ in specs]
    table = np.stack([got[key][1][r] for (key, _), r in zip(specs, rows, strict=True)], axis=1)
    if nu_extrap is None:
        return table, None
    return table, np.stack([got[key][2][r] for (key, _), r in zip(specs, rows, strict=True)], axis=1)


def _unit_table(terms, opacity, nodes, nu, w, nu_extrap, k_lo=None):
    """Unit powers on the beta nodes: (table (n_nodes, n_cols), column of each term, extrap table or None).

    On Lagrange nodes (``k_lo`` given: the index of the first node) the
    unextinguished spectra with value keys come from :func:`_node_columns`;
    the others (extinguished, identity-keyed) are integrated here.
    """
    groups: dict = {}
    for t in terms:
        ckey = None if t.curve is None else t.curve.key
        g = groups.setdefault((t.key, ckey), {"unit": t.unit, "key": t.key, "curve": t.curve, "av": {}})
        g["av"].setdefault(t.A_V, len(g["av"]))
    shared = k_lo is not None and _opacity_key(opacity)[0] != "object"
    blocks, cached, offset, start = [], [], 0, {}
    for gk, g in groups.items():
        j = _unit_spectrum(g["unit"], g["key"], nu)
        start[gk] = offset
        if g["curve"] is None and shared and g["key"][0] != "object":  # one column (A_V = 0)
            cached.append((offset, g["key"], j))
            offset += 1
            continue
        av = np.fromiter(g["av"], float, len(g["av"]))
        if g["curve"] is None:
            cols = np.broadcast_to(j[:, None], (nu.size, av.size))
        else:  # every distinct A_V of this spectrum and curve in one matrix
            cols = j[:, None] * np.exp(-g["curve"].tau_per_av(nu)[:, None] * av[None, :])
        blocks.append((offset, cols))
        offset += av.size
    table = np.empty((nodes.size, offset))
    above = np.empty((nodes.size, offset))  # the part above nu_extrap (unused without one)
    if blocks:
        kw = _kappa_rows(opacity, nodes, nu, w)  # (n_nodes, n_nu)
        where = np.concatenate([o + np.arange(c.shape[1]) for o, c in blocks])
        jmat = np.concatenate([c for _, c in blocks], axis=1)  # (n_nu, n_cols)
        if nu_extrap is None:
            table[:, where] = kw @ jmat
        else:  # both in one product: the rows of kw (the larger operand) are read once
            both = kw @ np.concatenate([jmat, jmat * (nu > nu_extrap)[:, None]], axis=1)
            table[:, where], above[:, where] = both[:, :where.size], both[:, where.size:]
    if cached:
        where = np.array([o for o, _, _ in cached])
        t_c, x_c = _node_columns(opacity, [(key, j) for _, key, j in cached], k_lo, nodes.size, nu, w, nu_extrap)
        table[:, where] = t_c
        if x_c is not None:
            above[:, where] = x_c
    extra = None if nu_extrap is None else above
    col = [start[(t.key, None if t.curve is None else t.curve.key)]
           + groups[(t.key, None if t.curve is None else t.curve.key)]["av"][t.A_V] for t in terms]
    return table, np.asarray(col, int), extra


def _interpolate(table, how, nodes, aux, b, col):
    """table[beta node, column] at betas ``b`` (n, m) and columns ``col`` (n, k) -> (n, m, k)."""
    if how == "direct":
        return table[aux[:, :, None], col[:, None, :]]
    n_cols = table.shape[1]
    ln = np.log(np.maximum(table, 1e-300)).ravel()
    x = b / BETA_NODE_STEP
    j = np.clip(np.floor(x).astype(int) - 1 - aux, 0, nodes.size - 4)
    x = x - (aux + j)  # in [1, 2) inside the node range
    wts = (-(x - 1) * (x - 2) * (x - 3) / 6, x * (x - 2) * (x - 3) / 2,
           -x * (x - 1) * (x - 3) / 2, x * (x - 1) * (x - 2) / 6)
    first = (j * n_cols)[:, :, None] + col[:, None, :]  # flat index of (node j, column), (n, m, k)
    out = sum(wk[:, :, None] * np.take(ln, first + k * n_cols) for k, wk in enumerate(wts))
    return np.where(np.take(table.ravel() > 0, first), np.exp(out), 0.0)


@overload
def absorbed_power_chunk(fields: Sequence[RadiationField], opacity: Opacity, beta: ArrayLike, *,
                         nu_grid: u.Quantity | ArrayLike | None = None,
                         extrapolated: Literal[False] = False) -> np.ndarray: ...
@overload
def absorbed_power_chunk(fields: Sequence[RadiationField], opacity: Opacity, beta: ArrayLike, *,
                         nu_grid: u.Quantity | ArrayLike | None = None,
                         extrapolated: Literal[True]) -> tuple[np.ndarray, np.ndarray]: ...
@overload
def absorbed_power_chunk(fields: Sequence[RadiationField], opacity: Opacity, beta: ArrayLike, *,
                         nu_grid: u.Quantity | ArrayLike | None = None,
                         extrapolated: bool = False) -> np.ndarray | tuple[np.ndarray, np.ndarray]: ...
def absorbed_power_chunk(fields: Sequence[RadiationField], opacity: Opacity, beta: ArrayLike, *,
                         nu_grid: u.Quantity | ArrayLike | None = None,
                         extrapolated: bool = False) -> np.ndarray | tuple[np.ndarray, np.ndarray]:
    """Absorbed power per unit mass, per source, draw and field component (W kg^-1).

    Parameters
    ----------
    fields : sequence of RadiationField, length n
        One field per source (sums keep their ``components``; attenuated
        fields as :func:`sedtemp.fields.build_field` returns them).
    opacity : Opacity
    beta : ndarray, shape (n,) or (n, m)
        Emissivity index per source (and draw).
    nu_grid : keyword-only
        Absorption grid (bare numbers in Hz); default :data:`DEFAULT_NU_GRID_HZ`.
    extrapolated : bool, keyword-only
        Also return the part absorbed above ``opacity.extrapolated_above_hz``
        (zeros if the opacity is valid everywhere).

    Returns
    -------
    ndarray (n, m, k) [, ndarray (n, m, k)]
        k = the largest number of components of any field (missing slots are
        0); m = 1 for a 1-D ``beta``.

    Notes
    -----
    Distinct betas up to 16 are integrated directly; more are interpolated
    (4-point Lagrange in ln P) from nodes :data:`BETA_NODE_STEP` apart at
    fixed multiples of it, so a source's result does not depend on the chunk
    it is in beyond rounding (~1e-15).
    """
    p, px, _ = _chunk_powers(fields, opacity, beta, nu_grid, extrapolated, None, "absorbed_power_chunk")
    return p if not extrapolated else (p, px)


def absorbed_power_and_reference(fields: Sequence[RadiationField], opacity: Opacity, beta: ArrayLike,
                                 reference: RadiationField, *, nu_grid: u.Quantity | ArrayLike | None = None
                                 ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """:func:`absorbed_power_chunk` with ``extrapolated=True``, and the power of a reference field, at once.

    Parameters
    ----------
    fields, opacity, beta, nu_grid
        As in :func:`absorbed_power_chunk`.
    reference : RadiationField
        One field absorbed at every source's betas too (e.g. ``ISRF(1)``, for
        the U that would explain a temperature).

    Returns
    -------
    power, extrapolated : ndarray (n, m, k)
        As :func:`absorbed_power_chunk` returns them.
    reference_power : ndarray (n, m)
        Absorbed power of ``reference`` (W kg^-1) at each source's betas.

    Notes
    -----
    The reference's unit spectra join the chunk's (one that a field already
    has, such as the ISRF's, is integrated once for both), so the opacity
    rows are multiplied once instead of once per call; the result equals a
    separate :func:`absorbed_power_chunk` of ``[reference] * n`` to rounding.
    """
    return _chunk_powers(fields, opacity, beta, nu_grid, True, reference, "absorbed_power_and_reference")


def _chunk_powers(fields, opacity, beta, nu_grid, extrapolated, reference, who):
    """(power (n, m, k), extrapolated part or None, reference power (n, m) or None)."""
    n = len(fields)
    b = np.asarray(beta, float)
    b = b[:, None] if b.ndim == 1 else b
    if b.ndim != 2 or b.shape[0] != n:
        raise InputError(f"{who}: beta must have shape ({n},) or ({n}, m), got {np.shape(beta)}")
    comps = []
    for i, f in enumerate(fields):
        if not isinstance(f, RadiationField):
            raise InputError(f"source {i}: the field must be a sedtemp.radiation field, got {type(f).__name__}")
        comps.append(f.components)
    k = max(len(c) for c in comps) if comps else 0
    terms = [decompose(c) for cs in comps for c in cs]
    ref_terms = [] if reference is None else [decompose(c) for c in reference.components]
    slot = np.array([(i, c) for i, cs in enumerate(comps) for c in range(len(cs))], int).reshape(-1, 2)
    nu, w = frequency_grid(nu_grid)
    how, nodes, aux = _beta_nodes(b)
    nu_x = opacity.extrapolated_above_hz if extrapolated else None
    table, col_flat, extra = _unit_table(terms + ref_terms, opacity, nodes, nu, w, nu_x,
                                         aux if how == "lagrange" else None)
    # the reference's terms are extra slots k, k + 1, ... of every source
    col = np.zeros((n, k + len(ref_terms)), int)
    scale = np.zeros(col.shape)
    col[slot[:, 0], slot[:, 1]] = col_flat[:len(terms)]
    scale[slot[:, 0], slot[:, 1]] = [t.scale for t in terms]
    col[:, k:] = col_flat[len(terms):]
    scale[:, k:] = [t.scale for t in ref_terms]
    p_all = _interpolate(table, how, nodes, aux, b, col) * scale[:, None, :]
    p, p_ref = p_all[..., :k], (p_all[..., k:].sum(axis=-1) if ref_terms else None)
    px = None
    if extrapolated:
        px = np.zeros_like(p) if extra is None else (
            _interpolate(extra, how, nodes, aux, b, col[:, :k]) * scale[:, None, :k])
    return p, px, p_ref


#: Fraction of the absorbed power from where the opacity is extrapolated above
#: which a warning is issued and the ``opacity_extrapolated`` flag is set.
EXTRAPOLATION_WARN_FRACTION = 0.01


def warn_extrapolated(fraction: ArrayLike, opacity: Opacity, who: str) -> None:
    """Issue one :class:`~sedtemp.errors.OpacityExtrapolationWarning` if any fraction exceeds the limit.

    Parameters
    ----------
    fraction : array_like
        Fraction of the absorbed power absorbed above ``opacity.extrapolated_above_hz``.
    opacity : Opacity
    who : str
        The calling function, for the message.
    """
    import warnings

    from .errors import OpacityExtrapolationWarning

    f = np.asarray(fraction, float)
    over = f > EXTRAPOLATION_WARN_FRACTION
    if not over.any():
        return
    lam_um = 2.99792458e14 / opacity.extrapolated_above_hz
    many = f"{int(over.sum())} of {f.size} sources/draws, up to " if f.size > 1 else ""
    warnings.warn(
        f"{who}: {many}{100 * float(f.max()):.0f} % of the absorbed power comes from wavelengths "
        f"shortward of {lam_um:.3g} um, where the opacity {opacity!r} is an extrapolation; T_eq is "
        "then set by that extrapolation. Use an opacity with a UV/optical part (e.g. "
        "SaturatedPowerLawOpacity with grain_radius, or a TabulatedOpacity) for a field with starlight",
        OpacityExtrapolationWarning, stacklevel=3)
