"""Figures: structure, plotted values against independent evaluations, files, style isolation.

No pixel baselines: each test checks what a figure shows (labels, limits,
the plotted numbers) against a value computed here without the plotting code.
"""

import ast
import dataclasses
import importlib
import inspect
import types
import warnings

import astropy.units as u
import emcee
import matplotlib as mpl
import numpy as np
import pytest
from astropy.table import Table
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.path import Path as MplPath
from scipy import stats

from sedtemp import plots
from sedtemp.bands import Band, BandSet
from sedtemp.errors import ConvergenceWarning, InputError
from sedtemp.fit import fit_source
from sedtemp.models import ModifiedBlackbody

C_UM_GHZ = 299792.458  # c in um GHz (exact: c = 299 792 458 m/s by definition of the metre)
TRUTH = {"log10_mass": -2.0, "T": 18.0, "beta": 1.8}
BAND_UM = {"b100": 100.0, "b160": 160.0, "b250": 250.0, "b350": 350.0, "b500": 500.0}


# ---------------------------------------------------------------- fixtures
@pytest.fixture(scope="module")
def fit():
    """An invented 5-band source (S/N 20, b500 given as an upper limit), fitted once."""
    bands = BandSet([Band.tophat(n, w, 0.3) for n, w in BAND_UM.items()])
    model = ModifiedBlackbody(distance=140 * u.pc)
    theta = np.array([[TRUTH[n] for n in model.param_names]])
    flux = bands.band_fluxes(model.sed(bands.nu_grid_hz * u.Hz, theta))[0].to_value(u.Jy)
    flux_err = 0.05 * flux
    flux[-1] = 1.5 * flux[-1]  # the limit lies above the model, as a real 3-sigma limit would
    with warnings.catch_warnings():
        # A short fit: whether it meets every convergence criterion is tested in
        # the fit tests; the plots only need its draws and chain.
        warnings.simplefilter("ignore", ConvergenceWarning)
        return fit_source(flux * u.Jy, flux_err * u.Jy, bands, model=model, ess_target=200, seed=1,
                          upper_limits=["b500"])


@pytest.fixture(scope="module")
def catalogue():
    """A small invented catalogue with every flag, fit and equilibrium temperatures in K."""
    rng = np.random.default_rng(3)
    n = 10
    t = rng.uniform(10.0, 40.0, n)
    t_eq = t * rng.uniform(0.7, 1.4, n)
    beta = rng.uniform(1.2, 2.2, n)
    flags = np.array(list(plots.FLAG_STYLES) * 2)[:n]
    return Table({
        "id": [f"src{i}" for i in range(n)],
        "T_median": t * u.K, "T_p16": (t - 1.5) * u.K, "T_p84": (t + 2.0) * u.K,
        "T_eq_median": t_eq * u.K, "T_eq_p16": (t_eq - 1.0) * u.K, "T_eq_p84": (t_eq + 1.2) * u.K,
        "beta_median": beta, "beta_p16": beta - 0.2, "beta_p84": beta + 0.25,
        "heating_class": flags,
    })


def _draws(result, n_draws):
    """The documented draw selection: evenly spaced through the chain-ordered samples."""
    n = len(result.samples["T"])
    idx = np.unique(np.linspace(0, n - 1, min(n_draws, n)).round().astype(int))
    return np.column_stack([result.samples[p][idx] for p in result.param_names])


def _line(ax, gid):
    (line,) = [ln for ln in ax.lines if ln.get_gid() == gid]
    return line


def _x_extent(patch):
    """Data x-range of an axvspan (Rectangle or Polygon, depending on the matplotlib version)."""
    x = patch.get_patch_transform().transform(patch.get_path().vertices)[:, 0]
    return x.min(), x.max()


def _non_white_fraction(fig):
    canvas = FigureCanvasAgg(fig)
    canvas.draw()
    rgb = np.asarray(canvas.buffer_rgba())[..., :3]
    return np.mean(np.any(rgb < 250, axis=-1))


# ---------------------------------------------------------------- SED plot
@pytest.fixture(scope="module")
def sed_fig(fit):
    return plots.sed_plot(fit, n_draws=300)


def test_sed_median_line_is_pointwise_median_of_the_same_draws(fit, sed_fig):
    # Reference: model.sed (Jy, astropy units) evaluated here at the same 300
    # draws, median taken here. Same arithmetic, different code path through
    # the unit conversion: rtol 1e-10 (double-precision rounding only).
    ax = sed_fig.axes[0]
    line = _line(ax, "median_model")
    lam = np.asarray(line.get_xdata())
    ref = np.median(fit.model.sed(lam * u.um, _draws(fit, 300)).to_value(u.Jy), axis=0)
    np.testing.assert_allclose(line.get_ydata(), ref, rtol=1e-10)


def test_sed_bands_are_pointwise_quantiles(fit, sed_fig):
    # Reference: np.quantile of model.sed over the same draws. The 68 % fill
    # must span exactly [q16, q84] and the 95 % fill [q2.5, q97.5] at every grid x.
    ax = sed_fig.axes[0]
    lam = np.asarray(_line(ax, "median_model").get_xdata())
    s = fit.model.sed(lam * u.um, _draws(fit, 300)).to_value(u.Jy)
    for gid, (p_lo, p_hi) in {"band68": (0.16, 0.84), "band95": (0.025, 0.975)}.items():
        (fill,) = [c for c in ax.collections if c.get_gid() == gid]
        v = fill.get_paths()[0].vertices
        k = np.searchsorted(lam, v[:, 0])
        on = (k < lam.size) & np.isclose(lam[np.minimum(k, lam.size - 1)], v[:, 0], rtol=1e-12)
        top = np.full(lam.size, -np.inf)
        bot = np.full(lam.size, np.inf)
        np.maximum.at(top, k[on], v[on, 1])
        np.minimum.at(bot, k[on], v[on, 1])
        lo, hi = np.quantile(s, [p_lo, p_hi], axis=0)
        np.testing.assert_allclose(top, hi, rtol=1e-10)
        np.testing.assert_allclose(bot, lo, rtol=1e-10)


def test_sed_median_close_to_model_at_median_parameters(fit, sed_fig):
    # The pointwise median of S(theta) is not S(median theta) (S is non-linear
    # in theta); the difference is second order in the posterior width, so where
    # the data pin the SED (S/N 20, 100-350 um) it is far below the 5 % flux
    # errors: measured 0.45 %, tolerance 2 %. Reference: model.sed at the
    # posterior medians.
    line = _line(sed_fig.axes[0], "median_model")
    lam = np.asarray(line.get_xdata())
    inside = (lam >= 100.0) & (lam <= 350.0)
    theta_med = [np.median(fit.samples[p]) for p in fit.param_names]
    ref = fit.model.sed(lam[inside] * u.um, theta_med)[0].to_value(u.Jy)
    np.testing.assert_allclose(np.asarray(line.get_ydata())[inside], ref, rtol=0.02)


def test_sed_axes_labels_and_limits(fit, sed_fig):
    ax = sed_fig.axes[0]
    assert ax.get_xlabel() == r"$\lambda\ [\mathrm{\mu m}]$"
    assert ax.get_ylabel() == r"$S_\nu\ [\mathrm{Jy}]$"
    assert ax.get_xscale() == "log" and ax.get_yscale() == "log"
    # x range: half the shortest to twice the longest wavelength the bands cover
    lam_nodes = (fit.bands.nu_grid_hz * u.Hz).to_value(u.um, equivalencies=u.spectral())
    np.testing.assert_allclose(ax.get_xlim(), (0.5 * lam_nodes.min(), 2.0 * lam_nodes.max()), rtol=1e-12)
    # the top axis is frequency: its limits are c / lambda of the bottom limits
    # (reference: astropy's spectral equivalency)
    sed_fig.draw_without_rendering()  # a secondary axis takes its limits when drawn
    (top,) = ax.child_axes
    assert top.get_xlabel() == r"$\nu\ [\mathrm{GHz}]$"
    ghz = (np.array(ax.get_xlim()) * u.um).to_value(u.GHz, equivalencies=u.spectral())
    np.testing.assert_allclose(sorted(top.get_xlim()), sorted(ghz), rtol=1e-9)
    # every measured point, with its error bar, lies inside the y range
    data = _line(ax, "data")
    y = np.asarray(data.get_ydata())
    lo, hi = ax.get_ylim()
    assert lo < y.min() and y.max() * 1.05 < hi


def test_sed_data_points_and_upper_limit_arrow(fit, sed_fig):
    ax = sed_fig.axes[0]
    data = _line(ax, "data")
    # the four measured bands at their reference wavelengths, fluxes as given (Jy)
    lam_ref = C_UM_GHZ / (fit.bands.nu_ref_hz / 1e9)
    np.testing.assert_allclose(data.get_xdata(), lam_ref[:4], rtol=1e-12)
    np.testing.assert_allclose(data.get_ydata(), fit.flux_si[:4] / 1e-26, rtol=1e-12)  # 1 Jy = 1e-26 SI
    # b500 is an upper limit: one arrow from the limit value downwards
    (arrow,) = [t for t in ax.texts if t.get_gid() == "upper_limit"]
    limit_jy = fit.flux_si[4] / 1e-26
    np.testing.assert_allclose(arrow.xyann, (lam_ref[4], limit_jy), rtol=1e-12)
    np.testing.assert_allclose(arrow.xy, (lam_ref[4], limit_jy / 2.5), rtol=1e-12)


def test_sed_model_band_fluxes_marked(fit, sed_fig):
    # Reference: BandSet.band_fluxes (response-weighted integral) of model.sed
    # on the band grid for the same draws, median here; rtol 1e-10 (rounding).
    mk = _line(sed_fig.axes[0], "model_band_fluxes")
    s = fit.model.sed(fit.bands.nu_grid_hz * u.Hz, _draws(fit, 300)).to_value(u.Jy)
    np.testing.assert_allclose(mk.get_ydata(), np.median(fit.bands.band_fluxes(s), axis=0), rtol=1e-10)
    np.testing.assert_allclose(mk.get_xdata(), C_UM_GHZ / (fit.bands.nu_ref_hz / 1e9), rtol=1e-12)


def test_sed_flux_unit_mjy(fit, sed_fig):
    fig = plots.sed_plot(fit, n_draws=300, flux_unit="mJy")
    ax = fig.axes[0]
    assert ax.get_ylabel() == r"$S_\nu\ [\mathrm{mJy}]$"
    # exact unit scaling, 1 Jy = 1000 mJy
    np.testing.assert_allclose(_line(ax, "median_model").get_ydata(),
                               1e3 * np.asarray(_line(sed_fig.axes[0], "median_model").get_ydata()),
                               rtol=1e-12)


def test_sed_errors(fit):
    with pytest.raises(InputError, match=r"flux_unit 'K' is not a flux density"):
        plots.sed_plot(fit, flux_unit="K")
    with pytest.raises(InputError, match=r"n_draws must be an integer >= 2, got 1"):
        plots.sed_plot(fit, n_draws=1)
    with pytest.raises(InputError, match=r"sed_plot needs a FitResult with model, bands and fluxes"):
        plots.sed_plot(dataclasses.replace(fit, model=None))


# -------------------------------------------------------------- corner plot
def test_corner_labels_order_and_marks(fit):
    fig = plots.corner_plot(fit, T_eq=(15.0, 17.0), truths=TRUTH)
    axes = np.array(fig.axes).reshape(3, 3)
    # T first, then beta, then the amplitude in its physical unit (from result.units)
    assert [ax.get_xlabel() for ax in axes[-1]] == [
        r"$T_\mathrm{d}\ [\mathrm{K}]$", r"$\beta$", r"$\log_{10} M_\mathrm{d}\ [\mathrm{M_{\odot}}]$"]
    assert axes[1, 0].get_ylabel() == r"$\beta$"
    # T_eq band on every panel with T on the x axis (column 0), and as an
    # horizontal band where T is the y axis (row 0 holds only the T histogram)
    for i in range(3):
        (band,) = [p for p in axes[i, 0].patches if p.get_gid() == "T_eq_band"]
        np.testing.assert_allclose(_x_extent(band), (15.0, 17.0), rtol=1e-12)
    # truths as lines, the MAP as a point: exactly the given / stored values
    truth_x = [ln.get_xdata()[0] for ln in axes[2, 1].lines if ln.get_gid() == "truth_v"]
    truth_y = [ln.get_ydata()[0] for ln in axes[2, 1].lines if ln.get_gid() == "truth_h"]
    assert truth_x == [TRUTH["beta"]] and truth_y == [TRUTH["log10_mass"]]
    (pt,) = [ln for ln in axes[1, 0].lines if ln.get_gid() == "map_point"]
    assert (pt.get_xdata()[0], pt.get_ydata()[0]) == (fit.map_params["T"], fit.map_params["beta"])
    # the histograms span the posterior draws of T
    lo, hi = axes[0, 0].get_xlim()
    assert lo <= fit.samples["T"].min() and fit.samples["T"].max() <= hi
    assert _non_white_fraction(fig) > 0.05


def test_corner_t_eq_from_draws_or_comparison(fit):
    draws = np.random.default_rng(5).normal(16.0, 1.0, 4000)
    ref = np.quantile(draws, [0.16, 0.84])  # reference: numpy quantiles of the same draws
    for given in (draws * u.K, types.SimpleNamespace(T_eq=draws)):
        axes = np.array(plots.corner_plot(fit, T_eq=given).axes).reshape(3, 3)
        (band,) = [p for p in axes[0, 0].patches if p.get_gid() == "T_eq_band"]
        np.testing.assert_allclose(_x_extent(band), ref, rtol=1e-12)
        (med,) = [ln for ln in axes[0, 0].lines if ln.get_gid() == "T_eq_median"]
        assert med.get_xdata()[0] == pytest.approx(np.median(draws), rel=1e-12)


def test_corner_errors(fit):
    with pytest.raises(InputError, match=r"truths: unknown parameter\(s\) \['Tdust'\]"):
        plots.corner_plot(fit, truths={"Tdust": 18.0})
    with pytest.raises(InputError, match=r"truths: got 2 values but the model has 3 parameters"):
        plots.corner_plot(fit, truths=[18.0, 1.8])
    with pytest.raises(InputError, match=r"T_eq: give a \(low, high\) pair in K or >= 3 draws, got 1"):
        plots.corner_plot(fit, T_eq=[15.0])
    with pytest.raises(InputError, match=r"T_eq: unit m is not a temperature"):
        plots.corner_plot(fit, T_eq=[1, 2] * u.m)


# ---------------------------------------------------------- comparison plot
def test_comparison_points_limits_and_legend(catalogue):
    fig = plots.comparison_plot(catalogue)
    ax = fig.axes[0]
    assert ax.get_xlabel() == r"$T_\mathrm{eq}\ [\mathrm{K}]$ (radiative equilibrium)"
    assert ax.get_ylabel() == r"$T_\mathrm{fit}\ [\mathrm{K}]$ (SED fit)"
    # equal ranges on both axes, the 1:1 line across them, every error bar inside
    assert ax.get_xlim() == ax.get_ylim()
    one = _line(ax, "one_to_one")
    np.testing.assert_array_equal(one.get_xdata(), one.get_ydata())
    lo, hi = ax.get_xlim()
    ends = np.concatenate([np.asarray(catalogue[c]) for c in ("T_p16", "T_p84", "T_eq_p16", "T_eq_p84")])
    assert lo < ends.min() and ends.max() < hi
    # each flag's points are (T_eq, T_fit) of exactly its rows
    for flag in plots.FLAG_STYLES:
        pts = _line(ax, f"flag_{flag}")
        rows = np.asarray(catalogue["heating_class"]) == flag
        np.testing.assert_array_equal(pts.get_xdata(), np.asarray(catalogue["T_eq_median"])[rows])
        np.testing.assert_array_equal(pts.get_ydata(), np.asarray(catalogue["T_median"])[rows])
    assert ax.get_legend() is None  # the legend is the figure's, below the axes
    legend = [t.get_text() for t in fig.legends[0].get_texts()]
    assert legend == ["equal temperatures (1:1)"] + [s[2] for s in plots.FLAG_STYLES.values()]
    assert _non_white_fraction(fig) > 0.02


def test_comparison_legend_is_off_the_data(catalogue):
    """The legend box and the axes box do not overlap (in display pixels, after drawing)."""
    fig = plots.comparison_plot(catalogue)
    fig.canvas.draw()
    leg = fig.legends[0].get_window_extent()
    ax = fig.axes[0].get_window_extent()
    assert leg.y1 <= ax.y0 and not leg.overlaps(ax)
    fig_box = fig.bbox
    assert leg.x0 >= fig_box.x0 and leg.x1 <= fig_box.x1 and leg.y0 >= fig_box.y0  # inside the figure


def test_comparison_converts_units(catalogue):
    # T_eq columns in mK must plot as the same kelvin values (astropy unit conversion)
    t = catalogue.copy()
    for c in ("T_eq_median", "T_eq_p16", "T_eq_p84"):
        t[c] = t[c].to(u.mK)
    pts = _line(plots.comparison_plot(t).axes[0], "flag_consistent")
    rows = np.asarray(catalogue["heating_class"]) == "consistent"
    np.testing.assert_allclose(pts.get_xdata(), np.asarray(catalogue["T_eq_median"])[rows], rtol=1e-12)


def test_comparison_errors(catalogue):
    bad = catalogue.copy()
    bad["heating_class"][0] = "hot"
    with pytest.raises(InputError, match=r"unknown heating class value\(s\) \['hot'\] in column 'heating_class'"):
        plots.comparison_plot(bad)
    with pytest.raises(InputError, match=r"comparison_plot: the table has no column 'T_eq_p84'"):
        plots.comparison_plot(catalogue[[c for c in catalogue.colnames if c != "T_eq_p84"]])
    swapped = catalogue.copy()
    swapped["T_p16"][2] = swapped["T_p84"][2] + 1.0  # K, the column unit
    with pytest.raises(InputError, match=r"row 2 has T_p16 = .* not in increasing order"):
        plots.comparison_plot(swapped)


# ---------------------------------------------------------- population plot
def test_population_ellipses_are_68_percent_gaussian_regions(catalogue):
    t = catalogue.copy()
    t["T_beta_corr"] = np.linspace(-0.9, 0.5, len(t))
    ax = plots.population_plot(t).axes[0]
    assert ax.get_xlabel() == r"$T_\mathrm{d}\ [\mathrm{K}]$" and ax.get_ylabel() == r"$\beta$"
    (ell,) = [c for c in ax.collections if c.get_gid() == "ellipses"]
    # Reference: scipy chi2 with 2 dof; every vertex v of source i satisfies
    # (v - mu)^T C^-1 (v - mu) = chi2.ppf(0.68, 2), C from the half 68 % widths
    # and T_beta_corr. Exact geometry: rtol 1e-10.
    q = stats.chi2.ppf(0.68, 2)
    for i, path in enumerate(ell.get_paths()):
        row = {c: float(t[c][i]) for c in t.colnames if c not in ("id", "heating_class")}
        s_t = 0.5 * (row["T_p84"] - row["T_p16"])
        s_b = 0.5 * (row["beta_p84"] - row["beta_p16"])
        r = row["T_beta_corr"]
        cov = np.array([[s_t**2, r * s_t * s_b], [r * s_t * s_b, s_b**2]])
        d = path.vertices[:-1] - [row["T_median"], row["beta_median"]]
        np.testing.assert_allclose(np.einsum("ni,ij,nj->n", d, np.linalg.inv(cov), d), q, rtol=1e-10)
    lo, hi = ax.get_xlim()
    assert lo < np.min(t["T_p16"]) and np.max(t["T_p84"]) < hi


def test_population_contour_encloses_68_percent_of_draws(catalogue):
    # Correlated Gaussian draws (rho = -0.8, the degeneracy's sign). The level
    # is set so the region holds 68 % of the draws it was built from; contour
    # interpolation at the sub-bin scale leaves ~0.001 (measured): tolerance 0.01.
    # A fresh sample of the same Gaussian must fall inside with the same 68 %
    # (the region is the right one, not just one that fits its own draws):
    # measured over 12 seeds 0.678 +- 0.005 (binomial noise 0.0033 plus the
    # region's own sampling noise), so tolerance 0.015 is 3 sd.
    rng = np.random.default_rng(7)
    cov = [[4.0, -0.8 * 2.0 * 0.2], [-0.8 * 2.0 * 0.2, 0.04]]
    xy, fresh = rng.multivariate_normal([20.0, 1.7], cov, size=(2, 20000))
    ax = plots.population_plot(catalogue, draws={"src0": (xy[:, 0], xy[:, 1])}).axes[0]
    (cs,) = [c for c in ax.collections if c.get_gid() == "contour_src0"]
    polys = cs.get_paths()[0].to_polygons()

    def frac(p):
        inside = np.zeros(len(p), bool)
        for poly in polys:
            inside ^= MplPath(poly).contains_points(p)
        return inside.mean()

    assert abs(frac(xy) - 0.68) < 0.01
    assert abs(frac(fresh) - 0.68) < 0.015
    # the other nine sources keep ellipses
    (ell,) = [c for c in ax.collections if c.get_gid() == "ellipses"]
    assert len(ell.get_paths()) == len(catalogue) - 1


def test_population_errors(catalogue):
    with pytest.raises(InputError, match=r"draws given for id\(s\) \['nope'\] not in the table's 'id'"):
        plots.population_plot(catalogue, draws={"nope": (np.ones(20), np.ones(20))})
    t = catalogue.copy()
    t["T_beta_corr"] = 1.0
    with pytest.raises(InputError, match=r"'T_beta_corr' must lie in \(-1, 1\), got 1"):
        plots.population_plot(t)
    with pytest.raises(InputError, match=r"draws: each entry must be two 1-D arrays"):
        plots.population_plot(catalogue, draws={"src1": (np.ones(20), np.ones(5))})


# --------------------------------------------------------------- trace plot
def test_trace_walkers_and_autocorrelation(fit):
    fig = plots.trace_plot(fit)
    assert len(fig.axes) == 2 * len(fit.param_names)
    for j, name in enumerate(fit.param_names):
        ax_t, ax_a = fig.axes[2 * j], fig.axes[2 * j + 1]
        (walkers,) = [c for c in ax_t.collections if c.get_gid() == "walkers"]
        segs = walkers.get_segments()
        assert len(segs) == fit.n_walkers
        np.testing.assert_array_equal(segs[3][:, 1], fit.chain[:, 3, j])  # exact copy of the chain
        (burn,) = [p for p in ax_t.patches if p.get_gid() == "burn_in"]
        assert _x_extent(burn) == (0, fit.burn)
        # Reference: emcee.autocorr.function_1d per walker on the kept chain,
        # averaged over walkers. Same estimator, independent code: rtol 1e-9.
        ref = np.mean([emcee.autocorr.function_1d(fit.chain[fit.burn:, w, j])
                       for w in range(fit.n_walkers)], axis=0)
        acf = _line(ax_a, "acf")
        np.testing.assert_allclose(acf.get_ydata(), ref[: len(acf.get_ydata())], rtol=1e-9, atol=1e-12)
        assert _line(ax_a, "tau").get_xdata()[0] == fit.tau[name]
    assert fig.axes[-2].get_xlabel() == "step" and fig.axes[-1].get_xlabel() == "lag [steps]"


def test_trace_needs_a_chain(fit):
    with pytest.raises(InputError, match=r"trace_plot needs an MCMC FitResult with a stored chain"):
        plots.trace_plot(dataclasses.replace(fit, chain=None, method="grid"))


# ------------------------------------------------- files, style, fig reuse
def test_save_figure_writes_pdf_and_png(fit, tmp_path):
    fig = plots.comparison_plot(Table({"T_median": [20.0], "T_p16": [19.0], "T_p84": [21.0],
                                       "T_eq_median": [18.0], "T_eq_p16": [17.0], "T_eq_p84": [19.5]}))
    paths = plots.save_figure(fig, tmp_path / "sub" / "cmp.v1")
    assert [p.name for p in paths] == ["cmp.v1.pdf", "cmp.v1.png"]
    assert paths[0].read_bytes()[:5] == b"%PDF-"  # PDF magic (ISO 32000)
    assert paths[1].read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (RFC 2083)
    with pytest.raises(InputError, match=r"unknown figure format\(s\) \['docx'\]"):
        plots.save_figure(fig, tmp_path / "x", formats=("pdf", "docx"))
    with pytest.raises(InputError, match=r"save_figure needs a matplotlib Figure, got str"):
        plots.save_figure("fig", tmp_path / "x")
    out = plots.sed_plot(fit, n_draws=50, save_to=tmp_path / "sed")
    assert isinstance(out, Figure) and (tmp_path / "sed.pdf").stat().st_size > 1000


def test_figures_not_blank_and_readable(fit, catalogue, sed_fig):
    figs = {"sed": sed_fig, "comparison": plots.comparison_plot(catalogue),
            "population": plots.population_plot(catalogue), "trace": plots.trace_plot(fit)}
    for name, fig in figs.items():
        # a blank figure has no non-white pixel; a drawn one has > 2 % (measured 5-30 %)
        assert _non_white_fraction(fig) > 0.02, name
        sizes = [t.get_fontsize() for t in fig.findobj(mpl.text.Text) if t.get_text()]
        assert min(sizes) >= 7.0, name  # >= 7 pt: legible at print size (common practice)
    for name in ("sed", "comparison", "population"):
        assert figs[name].get_figwidth() == plots.SINGLE_COLUMN_IN


def test_style_is_local(fit, catalogue):
    before = dict(mpl.rcParams)
    with mpl.rc_context({"font.size": 20.0, "axes.labelsize": 20.0, "font.family": "monospace"}):
        fig = plots.comparison_plot(catalogue)
    assert fig.axes[0].xaxis.label.get_fontsize() == 8.0  # the house style, not the user's 20
    plots.population_plot(catalogue)
    assert dict(mpl.rcParams) == before


def test_no_pyplot_state(fit, catalogue):
    import matplotlib.pyplot as plt  # only to inspect its figure registry

    plots.corner_plot(fit)
    plots.sed_plot(fit, n_draws=50)
    assert plt.get_fignums() == []
    import pkgutil

    src = "\n".join(inspect.getsource(importlib.import_module(f"sedtemp.plots.{m.name}"))
                    for m in pkgutil.iter_modules(plots.__path__)) + inspect.getsource(plots)
    assert "def corner_plot" in src and "def population_plot" in src  # every module of the package
    imported = {a.name for node in ast.walk(ast.parse(src)) if isinstance(node, (ast.Import, ast.ImportFrom))
                for a in node.names} | {node.module for node in ast.walk(ast.parse(src))
                                        if isinstance(node, ast.ImportFrom)}
    assert "matplotlib.pyplot" not in imported and ".show(" not in src


def test_fig_argument(catalogue):
    fig = Figure(figsize=(3.0, 3.0))
    assert plots.comparison_plot(catalogue, fig=fig) is fig
    with pytest.raises(InputError, match=r"fig already has 1 axes; pass an empty Figure"):
        plots.comparison_plot(catalogue, fig=fig)
    with pytest.raises(InputError, match=r"fig must be a matplotlib Figure or SubFigure, got int"):
        plots.population_plot(catalogue, fig=3)
    sub = Figure().subfigures(1, 2)[1]
    assert plots.population_plot(catalogue, fig=sub) is sub


def test_colours_survive_greyscale():
    # SED bands: lighter to darker in relative luminance (WCAG 2.x / ITU-R BT.709
    # weights), so 95 % band, 68 % band and median stay ordered without colour.
    def lum(c):
        rgb = np.array(mpl.colors.to_rgb(c))
        lin = np.where(rgb <= 0.04045, rgb / 12.92, ((rgb + 0.055) / 1.055) ** 2.4)
        return lin @ [0.2126, 0.7152, 0.0722]

    c = plots._SED_COLOURS
    assert lum(c["band95"]) > lum(c["band68"]) + 0.1 > lum(c["median"]) + 0.2
    # every flag has its own marker, so categories stay apart in greyscale
    markers = [s[1] for s in plots.FLAG_STYLES.values()]
    assert len(set(markers)) == len(markers)


def test_population_without_correlation_column_draws_axis_aligned_ellipses(catalogue):
    # Documented fallback: rho = 0. The half extents are then exactly
    # r sigma_T and r sigma_beta, r = sqrt(chi2.ppf(0.68, 2)) (scipy reference).
    t = catalogue[[c for c in catalogue.colnames if c != "heating_class"]]
    (ell,) = [c for c in plots.population_plot(t).axes[0].collections if c.get_gid() == "ellipses"]
    r = np.sqrt(stats.chi2.ppf(0.68, 2))
    v = ell.get_paths()[0].vertices
    s_t = 0.5 * float(t["T_p84"][0] - t["T_p16"][0])
    s_b = 0.5 * float(t["beta_p84"][0] - t["beta_p16"][0])
    # vertices every 2 pi / 63 in phase: a sampled extreme is within
    # 1 - cos(pi / 63) = 1.2e-3 of the true one, so rtol 1.5e-3
    np.testing.assert_allclose(0.5 * np.ptp(v[:, 0]), r * s_t, rtol=1.5e-3)
    np.testing.assert_allclose(0.5 * np.ptp(v[:, 1]), r * s_b, rtol=1.5e-3)
    # centred on the medians: the polygon's bounding-box centre, same 1.5e-3 of a half width
    np.testing.assert_allclose(0.5 * (v[:, 0].max() + v[:, 0].min()), float(t["T_median"][0]),
                               atol=1.5e-3 * r * s_t)


def test_sed_non_positive_measured_flux_becomes_an_arrow(fit):
    # a measured flux <= 0 cannot be drawn on a log axis: documented as an arrow from flux + 2 sigma
    flux = fit.flux_si.copy()
    flux[1] = -0.5 * fit.err_si[1]
    ax = plots.sed_plot(dataclasses.replace(fit, flux_si=flux), n_draws=50).axes[0]
    starts = sorted(a.xyann[1] for a in ax.texts if a.get_gid() == "upper_limit")
    expected = sorted([(flux[4]) / 1e-26, 2.0 * fit.err_si[1] / 1e-26])  # 1 Jy = 1e-26 W m-2 Hz-1
    np.testing.assert_allclose(starts, expected, rtol=1e-12)
    assert len(_line(ax, "data").get_xdata()) == 3


def test_corner_widens_t_range_to_show_a_distant_t_eq(fit):
    # T_eq far above the posterior: every panel with T on an axis must show the
    # whole band and all T draws (what a reader compares), exact limits check
    axes = np.array(plots.corner_plot(fit, T_eq=(25.0, 27.0)).axes).reshape(3, 3)
    for i in range(3):
        lo, hi = axes[i, 0].get_xlim()
        assert lo <= fit.samples["T"].min() and hi >= 27.0
    assert axes[1, 0].get_xlim() == axes[0, 0].get_xlim()


def test_remaining_error_messages(fit, catalogue):
    renamed = dataclasses.replace(
        fit, param_names=("log10_mass", "T_x", "beta"),
        samples={"log10_mass": fit.samples["log10_mass"], "T_x": fit.samples["T"], "beta": fit.samples["beta"]},
        map_params={"log10_mass": 0.0, "T_x": 18.0, "beta": 1.8})
    with pytest.raises(InputError, match=r"T_eq is drawn on the parameter 'T', which this model lacks"):
        plots.corner_plot(renamed, T_eq=(15.0, 17.0))
    no_id = catalogue[[c for c in catalogue.colnames if c != "id"]]
    with pytest.raises(InputError, match=r"draws are matched to sources by the table's 'id' column"):
        plots.population_plot(no_id, draws={"src0": (np.ones(20), np.ones(20))})
    with pytest.raises(InputError, match=r"draws: the T and beta draws of a source are constant"):
        plots.population_plot(catalogue, draws={"src0": (np.full(20, 18.0), np.arange(20.0))})


# ------------------------------------------------------------ corner options
def _diag_bins(fig, k):
    """Number of histogram bins drawn on the first diagonal panel of a k x k corner plot."""
    ax = fig.axes[0]
    patch = ax.patches[0] if ax.patches else None
    if patch is not None:  # corner draws histtype="step": one polygon with 2 vertices per bin edge
        return (len(patch.get_xy()) - 2) // 2
    raise AssertionError("no histogram drawn")


def test_corner_options_are_passed_to_corner(fit):
    k = len(fit.param_names)
    default = plots.corner_plot(fit)
    assert _diag_bins(default, k) == 30  # our default, bins=30
    more = plots.corner_plot(fit, corner_options={"bins": 12, "show_titles": True, "title_fmt": ".1f"})
    assert _diag_bins(more, k) == 12
    titles = [more.axes[i * (k + 1)].get_title() for i in range(k)]
    assert all(t for t in titles)  # show_titles: one title per diagonal panel
    import matplotlib.pyplot as plt  # only to inspect its figure registry

    assert plt.get_fignums() == []


def test_corner_options_errors(fit):
    with pytest.raises(InputError, match=r"corner_options must be a mapping of corner.corner arguments, got list"):
        plots.corner_plot(fit, corner_options=[("bins", 3)])
    with pytest.raises(InputError, match=r"corner_options: 'fig' is set by corner_plot itself"):
        plots.corner_plot(fit, corner_options={"fig": None})
    with pytest.raises(InputError, match=r"corner_options: 'bin' is not an argument of corner.corner "
                                         r"\(did you mean 'bins'"):
        plots.corner_plot(fit, corner_options={"bin": 12})


@pytest.mark.parametrize("name", ["corner_plot", "sed_plot", "trace_plot"])
def test_source_figures_accept_fig_and_return_it(fit, name):
    fig = Figure()
    kw = {"n_draws": 50} if name == "sed_plot" else {}
    assert getattr(plots, name)(fit, fig=fig, **kw) is fig


def test_comparison_skips_rows_without_a_flag(catalogue):
    """A results file read back has masked cells for skipped sources: those rows are not drawn."""
    from astropy.table import MaskedColumn

    t = catalogue.copy()
    t["heating_class"] = MaskedColumn([str(f) for f in t["heating_class"]], mask=[i == 2 for i in range(len(t))])
    for c in ("T_median", "T_p16", "T_p84"):
        t[c] = MaskedColumn(np.asarray(t[c], float), mask=[i == 2 for i in range(len(t))])
    ax = plots.comparison_plot(t).axes[0]
    drawn = sum(len(_line(ax, f"flag_{f}").get_xdata()) for f in plots.FLAG_STYLES
                if any(line.get_gid() == f"flag_{f}" for line in ax.lines))
    assert drawn == len(t) - 1
