"""The fast paths of predict and compare give the numbers of the plain computations they replace.

Each vectorised or cached path (the emission spline evaluated per knot cell,
the ISRF(1) of ``U_implied`` absorbed with the fields, the unit powers cached
on the Lagrange beta nodes, the comparison of a chunk) is checked here against
the straightforward computation: fitpack's own evaluation, separate calls,
cold caches, and a per-source, per-draw reference with a bracketing root finder.
"""

import astropy.units as u
import numpy as np
import pytest
from scipy.optimize import brentq

from sedtemp import absorption
from sedtemp.absorption import absorbed_power_and_reference, absorbed_power_chunk
from sedtemp.compare import DistanceUncertainty, ScaleUncertainty, compare_chunk, row_seed
from sedtemp.compare.chunk import source_factors
from sedtemp.compare.uncertainty import _Shared
from sedtemp.emission import emission_table
from sedtemp.fields import build_field
from sedtemp.fit.summary import QUANTILES
from sedtemp.opacity import PowerLawOpacity, SaturatedPowerLawOpacity, TabulatedOpacity
from sedtemp.radiation import CMB, ISRF

CAPPED = SaturatedPowerLawOpacity(10 * u.cm**2 / u.g, 1 * u.THz, 1.8, grain_radius=0.1 * u.um)
BARE = PowerLawOpacity(10.0, 1e12, 2.0)  # extrapolated above 3 um: the extrapolated part is non-zero
TAB = TabulatedOpacity(np.array([0.1, 1.0, 10.0, 100.0, 1000.0]) * u.um,
                       np.array([3e4, 1e4, 8e2, 30.0, 0.4]) * u.cm**2 / u.g)


def _fields(n, rng, extinct=True):
    """ISRF + star + CMB per source, half of them behind A_V (the uncached, per-A_V columns)."""
    out = []
    for i in range(n):
        comps = [{"kind": "isrf", "U": float(rng.uniform(0.5, 5.0))},
                 {"kind": "star", "teff": 3.3e4 * u.K, "luminosity": 1.2e5 * u.L_sun,
                  "distance": float(rng.uniform(0.5, 3.0)) * u.pc},
                 {"kind": "cmb"}]
        out.append(build_field(comps, A_V=float(rng.uniform(0.5, 6.0)) if extinct and i % 2 else 0.0))
    return out


def _clear_caches():
    for cache in (absorption._KW_CACHE, absorption._KW_MATRICES, absorption._J_CACHE, absorption._COLUMNS):
        cache.clear()


@pytest.mark.parametrize("opacity", [BARE, CAPPED, TAB], ids=["power-law", "capped", "table"])
def test_cell_polynomials_equal_the_fitpack_spline(opacity):
    # reference library: scipy RectBivariateSpline.ev (FITPACK) of the same spline. The cell
    # polynomials are the same piecewise cubic, so only rounding differs: ~1e-14 in ln P (|ln P| < 80),
    # ~1e-12 in the slope and ~1e-10 in the curvature (FITPACK's own derivative evaluation); the
    # bounds are 10x that. Nodes and cell edges included.
    tab = emission_table(opacity)
    rng = np.random.default_rng(31)
    x = np.concatenate([rng.uniform(tab.ln_t[0], tab.ln_t[-1], 20000), tab.ln_t[[0, 1, 2, 100, -3, -2, -1]]])
    b = np.concatenate([rng.uniform(tab.beta[0], tab.beta[-1], 20000), tab.beta[[0, 1, -1, 7, -2, 3, 2]]])
    val, d1, d2 = tab.cells(x, b, derivs=2)
    np.testing.assert_allclose(val, tab.spline.ev(x, b), rtol=0, atol=1e-12)
    np.testing.assert_allclose(d1, tab.spline.ev(x, b, dx=1), rtol=0, atol=1e-10)
    np.testing.assert_allclose(d2, tab.spline.ev(x, b, dx=2), rtol=0, atol=1e-9)


@pytest.mark.parametrize("opacity", [BARE, CAPPED], ids=["power-law", "capped"])
@pytest.mark.parametrize("n_beta", [5, 200], ids=["direct", "lagrange"])
def test_reference_absorbed_with_the_fields_equals_separate_calls(opacity, n_beta):
    # the one-integration path against the two calls it replaces (the fields with their
    # extrapolated part, then [ISRF(1)] * n), and against one source at a time: equal to
    # rounding (1e-12 relative; the same beta nodes, only the matrix products' summation differs)
    rng = np.random.default_rng(32)
    n = 6
    fields = _fields(n, rng)
    b = rng.choice(rng.uniform(0.8, 2.6, n_beta), (n, 40))
    ref = ISRF(2.0) + CMB(0.5)  # a sum, one of its spectra not in any field
    p, px, p_ref = absorbed_power_and_reference(fields, opacity, b, ref)
    _clear_caches()
    p0, px0 = absorbed_power_chunk(fields, opacity, b, extrapolated=True)
    ref0 = absorbed_power_chunk([ref] * n, opacity, b).sum(axis=-1)
    np.testing.assert_allclose(p, p0, rtol=1e-12, atol=0)
    np.testing.assert_allclose(px, px0, rtol=1e-12, atol=0)
    np.testing.assert_allclose(p_ref, ref0, rtol=1e-12, atol=0)
    assert (px > 0).any() == (opacity is BARE)
    for i in range(n):
        one, one_x = absorbed_power_chunk([fields[i]], opacity, b[i:i + 1], extrapolated=True)
        np.testing.assert_allclose(p[i], one[0], rtol=1e-12, atol=0)
        np.testing.assert_allclose(px[i], one_x[0], rtol=1e-12, atol=0)


def test_node_columns_cached_across_chunks_equal_a_cold_computation():
    # chunks whose betas reach beyond the cached node range (the columns are then extended)
    # give what a cold process gives: the same integrals on the same nodes, 1e-13 relative
    rng = np.random.default_rng(33)
    fields = _fields(5, rng, extinct=False)
    chunks = [rng.uniform(1.4, 1.7, (5, 30)), rng.uniform(0.6, 2.9, (5, 30)), rng.uniform(2.5, 3.2, (5, 30))]
    _clear_caches()
    warm = [absorbed_power_chunk(fields, BARE, b, extrapolated=True) for b in chunks]
    assert absorption._COLUMNS  # the unextinguished spectra went through the node cache
    # extending a column adds nodes and changes none: the first chunk again, bit for bit
    again = absorbed_power_chunk(fields, BARE, chunks[0], extrapolated=True)
    np.testing.assert_array_equal(again[0], warm[0][0])
    np.testing.assert_array_equal(again[1], warm[0][1])
    for b, (p, px) in zip(chunks, warm, strict=True):
        _clear_caches()
        p0, px0 = absorbed_power_chunk(fields, BARE, b, extrapolated=True)
        np.testing.assert_allclose(p, p0, rtol=1e-13, atol=0)
        np.testing.assert_allclose(px, px0, rtol=1e-13, atol=0)


def _reference_draws(T, b, field, opacity, seed, spec, op_unc):
    """One source, the pre-vectorisation way: its own absorbed-power calls and a root finder per draw."""
    fac, _, q = source_factors(spec, field, False, T.size, seed, op_unc, _Shared(None))
    p_comp = absorbed_power_chunk([field], opacity, b[None])[0]
    p_abs = np.sum(p_comp * fac[:, :p_comp.shape[-1]], axis=-1) * q
    tab = emission_table(opacity)
    # brentq on the forward table: independent of the inverted table and of Newton's method
    t_eq = np.array([brentq(lambda t, p=p, bb=bb: float(tab.power(t, bb)) - p, 0.5, 5000.0, xtol=1e-12, rtol=1e-14)
                     for p, bb in zip(p_abs, b, strict=True)])
    p_emit = tab.power(T, b)
    u_implied = p_emit / absorbed_power_chunk([ISRF(1.0)], opacity, b[None])[0, :, 0]
    return {"T_eq": t_eq, "ratio": T / t_eq, "U_implied": u_implied, "field_scale": p_emit / p_abs,
            "extra_power": p_emit - p_abs}


def test_compare_chunk_equals_a_per_source_per_draw_reference():
    # T_eq per draw to 1e-9 relative (brentq's tolerance 1e-12 K, and the inversion's 1e-10 in ln T),
    # U_implied and the power columns to 1e-9 (through T_eq only where it enters), and every
    # quantile column as np.quantile of the reference draws
    rng = np.random.default_rng(34)
    n, m = 4, 60
    fields = _fields(n, rng)
    T = rng.uniform(12.0, 45.0, (n, m))
    b = rng.uniform(0.8, 2.8, (n, m))
    seeds = [row_seed(5, f"R{i}") for i in range(n)]
    spec = {0: ScaleUncertainty(1.4), 1: DistanceUncertainty(0.25)}
    got = compare_chunk(T, b, fields, CAPPED, seeds=seeds, field_uncertainty=spec, opacity_uncertainty=0.3,
                        keep_draws=True)
    probs = list(QUANTILES.values())
    for i in range(n):
        ref = _reference_draws(T[i], b[i], fields[i], CAPPED, row_seed(5, f"R{i}"), spec, 0.3)
        np.testing.assert_allclose(got["draws_T_eq"][i], ref["T_eq"], rtol=1e-9, atol=0)
        np.testing.assert_allclose(got["draws_ratio"][i], ref["ratio"], rtol=1e-9, atol=0)
        for name, draws in ref.items():
            want = np.quantile(draws, probs)
            have = [got[f"{name}_{k}"][i] for k in QUANTILES]
            np.testing.assert_allclose(have, want, rtol=1e-9, atol=0, err_msg=name)
        assert got["p_warmer"][i] == np.mean(ref["T_eq"] < T[i])


def test_compare_stream_is_the_second_child_of_the_source_streams():
    # numpy's SeedSequence.spawn: child i has the parent's entropy and spawn key (i,); the
    # shortcut must give the identical stream (same state words, same draws)
    from importlib import resources

    from sedtemp.pipeline import load_workflow
    from sedtemp.pipeline.stages import _compare_stream, source_streams

    with resources.as_file(resources.files("sedtemp") / "data" / "demo" / "demo.toml") as path:
        wf = load_workflow(path)
    for key in ("VAR-0001", "VAR-0299", "x", ""):
        want, got = source_streams(wf, key)[1], _compare_stream(wf, key)
        assert (got.entropy, got.spawn_key, got.pool_size) == (want.entropy, want.spawn_key, want.pool_size)
        np.testing.assert_array_equal(got.generate_state(4), want.generate_state(4))
