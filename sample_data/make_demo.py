"""Generate the invented demo scenario bundled with sedtemp (``sedtemp demo``).

The scenario is made up for the demo, and every number in it is ours:

* the *Varnel cloud*, a fictional star-forming cloud at 530 pc;
* *Varnel-1*, a fictional hot star (T_eff = 33 000 K, L = 1.2e5 L_sun) at
  RA = 152.40 deg, Dec = +31.70 deg (an unremarkable, invented place on the
  sky, away from any known star-forming region), heating the cloud;
* 300 dust sources spread over 1-8 pc (projected) around the star, all in
  the plane of the sky through the star, so projected separation = true
  separation;
* six far-IR/submm bands of an invented instrument ("Kestrel", 70-500 um)
  with smooth, generic response curves of our own (super-Gaussians in
  frequency with a slight tilt), quoted for nu F_nu = const;
* three classes of source (the ``true_class`` column of the truth table):
  ``consistent`` (T is the radiative-equilibrium temperature in the modelled
  field: the interstellar field with U = 1, the star, the CMB),
  ``extra_heating`` (an embedded source: T is 1.5-2.2 times that) and
  ``shielded`` (a dense core: the true field is attenuated by A_V = 6-20 mag,
  which the catalogue does not say).

Fluxes are the band-integrated thin modified blackbody (sedtemp's own band
and model code) with 5 % noise, a flux floor, and shared calibration offsets
(5 % for the three short bands, 4 % for the three long ones), made by
``sedtemp.simulate.simulate_photometry``: the offsets scale the model fluxes
and the noise is added on top, the model the likelihood's calibration
covariance describes. Some sources
lack the 70 um band, faint 70 um fluxes become 3-sigma upper limits, and a
few sources have only two bands (the pipeline must skip them with a reason).

Run ``python sample_data/make_demo.py`` to rewrite ``sedtemp/data/demo``; the
output is fully determined by ``SEED``.
"""

from __future__ import annotations

import argparse
from pathlib import Path

import astropy.units as u
import numpy as np
from astropy.coordinates import SkyCoord
from astropy.table import Table

SEED = 20240611
N_SOURCES = 300
DISTANCE_PC = 530.0
STAR = {"teff_K": 33000.0, "luminosity_Lsun": 1.2e5, "ra_deg": 152.40, "dec_deg": 31.70}
#: name -> (centre in um, fractional width dnu/nu, calibration group)
BANDS = {"k70": (70.0, 0.35, "short"), "k110": (110.0, 0.35, "short"), "k170": (170.0, 0.35, "short"),
         "k250": (250.0, 0.30, "long"), "k350": (350.0, 0.30, "long"), "k500": (500.0, 0.30, "long")}
CALIBRATION = {"short": 0.05, "long": 0.04}
NOISE_FRACTION = 0.05
FLUX_FLOOR_MJY = 20.0
CLASS_FRACTIONS = {"consistent": 0.6, "extra_heating": 0.2, "shielded": 0.2}

WORKFLOW = """\
# Demo workflow for the invented Varnel cloud (sample_data/make_demo.py made the data).
# Paths are relative to this file. Run it with `sedtemp demo`.

[run]
seed = 2024
chunk_size = 25

[catalog]
path = "demo_catalog.ecsv"
id_column = "src"
distance = "530 pc"
ra_column = "ra"
dec_column = "dec"

{bands}
[calibration]
short = 0.05
long = 0.04

[model]
name = "thin"
amplitude = "mass"
# power law in the far-IR, capped at the geometric cross-section of 0.1 um grains in the UV
opacity = {{ kappa0 = "10 cm2 g-1", nu0 = "1 THz", beta = 2.0, grain_radius = "0.1 um" }}

[priors.T]
kind = "uniform"
low = 5.0
high = 120.0

[priors.beta]
kind = "uniform"
low = 0.5
high = 3.5

[fit]
method = "grid"
n_T = 90
n_beta = 50
n_draws = 300
# also sample these two sources with emcee (their rows say method = "mcmc")
mcmc_sources = ["VAR-0001", "VAR-0002"]
n_walkers = 24
ess_target = 200

[field]
uncertainty = 0.2
projected = false

[[field.components]]
kind = "isrf"
U = 1.0

[[field.components]]
kind = "star"
teff = "33000 K"
luminosity = "1.2e5 solLum"
position = {{ ra = 152.40, dec = 31.70 }}

[[field.components]]
kind = "cmb"

[output]
directory = "sedtemp-demo"
keep_draws = true
n_keep = 200
# corner and SED plots of the flagged sources in sedtemp-demo/sources, drawn from
# their grid posteriors (trace plots too for the MCMC sources); capped
source_plots = "flagged"
max_source_plots = 12

# the (T, beta) population of the cloud's sources, deconvolved from the
# per-source errors (population.ecsv and population_posterior.png)
[population]
enabled = true
n_walkers = 16
n_steps = 800
"""


def response_curve(center_um, width):
    """Generic response of our own: super-Gaussian (order 6) in frequency with a 10 % tilt."""
    nu_c = (center_um * u.um).to_value(u.Hz, equivalencies=u.spectral())
    nu = np.linspace(nu_c * (1 - 0.9 * width), nu_c * (1 + 0.9 * width), 160)
    x = (nu - nu_c) / (0.5 * width * nu_c)
    resp = np.exp(-np.abs(x) ** 6) * (1.0 + 0.1 * x)
    resp = np.clip(resp / resp.max(), 0.0, None)
    lam = (nu * u.Hz).to(u.um, equivalencies=u.spectral())
    order = np.argsort(lam)
    return Table({"wavelength": lam[order], "response": resp[order]})


def _bands_toml():
    out = []
    for name, (lam, _, group) in BANDS.items():
        w = int(lam)
        lim = f'limit = "L{w}"\n' if name == "k70" else ""
        out.append(f'[bands.{name}]\nflux = "F{w}"\nerror = "E{w}"\n{lim}calibration = "{group}"\n'
                   f'response = "bands/{name}.ecsv"\n')
    return "\n".join(out)


def _positions(rng, n):
    star = SkyCoord(STAR["ra_deg"] * u.deg, STAR["dec_deg"] * u.deg)
    sep_pc = np.exp(rng.uniform(np.log(1.0), np.log(8.0), n))
    angle = np.arctan(sep_pc / DISTANCE_PC) * u.rad
    pa = rng.uniform(0, 360, n) * u.deg
    pos = star.directional_offset_by(pa, angle)
    return pos, sep_pc


def opacity():
    """The demo's dust opacity (as in the workflow): 10 cm^2/g at 1 THz, saturated for 0.1 um grains."""
    from sedtemp.opacity import SaturatedPowerLawOpacity

    return SaturatedPowerLawOpacity(10 * u.cm**2 / u.g, 1 * u.THz, 2.0, grain_radius=0.1 * u.um)


def _field(sep_pc, a_v=0.0):
    from sedtemp.radiation import CMB, ISRF, Star

    star = Star(teff=STAR["teff_K"] * u.K, luminosity=STAR["luminosity_Lsun"] * u.solLum,
                distance=sep_pc * u.pc)
    fld = ISRF(1.0) + star + CMB()
    return fld.attenuated(a_v) if a_v > 0 else fld


def _temperatures(rng, sep_pc, beta, classes):
    from sedtemp.equilibrium import equilibrium_temperature

    kappa = opacity()
    t_model, t_true, a_v = np.empty(sep_pc.size), np.empty(sep_pc.size), np.zeros(sep_pc.size)
    for i in range(sep_pc.size):  # one equilibrium solve per source
        t_model[i] = equilibrium_temperature(_field(sep_pc[i]), kappa, beta=beta[i]).to_value(u.K)
        if classes[i] == "extra_heating":
            t_true[i] = t_model[i] * rng.uniform(1.5, 2.2)
        elif classes[i] == "shielded":
            a_v[i] = rng.uniform(6.0, 20.0)
            t_true[i] = equilibrium_temperature(_field(sep_pc[i], a_v[i]), kappa, beta=beta[i]).to_value(u.K)
        else:
            t_true[i] = t_model[i]
    return t_model, t_true, a_v


def _photometry(rng, theta, band_files):
    """Noisy band fluxes (mJy) through the written response curves, as the workflow reads them.

    sedtemp's one simulator: 5 % noise with the flux floor added in quadrature,
    one calibration offset per group and source scaling the model fluxes.
    """
    from sedtemp.bands import Band, BandSet
    from sedtemp.models import ModifiedBlackbody
    from sedtemp.simulate import simulate_photometry

    model = ModifiedBlackbody(opacity(), distance=DISTANCE_PC * u.pc)
    bs = BandSet([Band.from_file(n, band_files[n]) for n in BANDS])
    groups = {g: ([n for n, (_, _, grp) in BANDS.items() if grp == g], frac) for g, frac in CALIBRATION.items()}
    flux, err, _ = simulate_photometry(bs, model, theta, snr=1.0 / NOISE_FRACTION, floor=FLUX_FLOOR_MJY,
                                       calibration=groups, seed=rng, unit_si=1e-29)
    return flux, err


def _relocated(text, prefix, executor):
    """The workflow with its paths under ``prefix`` (and another executor, for the Dask copy)."""
    text = text.replace('path = "demo_catalog.ecsv"', f'path = "{prefix}/demo_catalog.ecsv"')
    text = text.replace('response = "bands/', f'response = "{prefix}/bands/')
    if executor:
        text = text.replace("[run]\n", "[run]\n" + executor, 1)
    return text


def write_workflows(datadir, workflow_dir):
    """workflows/demo.toml and workflows/dask.toml: the demo workflow run from the repository."""
    import os

    text = Path(datadir, "demo.toml").read_text(encoding="utf-8")
    prefix = Path(os.path.relpath(datadir, workflow_dir)).as_posix()
    Path(workflow_dir, "demo.toml").write_text(_relocated(text, prefix, ""), encoding="utf-8")
    dask = ('# Dask: a local cluster of [run] workers processes; set scheduler = "tcp://host:8786"\n'
            '# to use a running cluster instead (needs pip install "sedtemp[dask]").\n'
            'executor = "dask"\nworkers = 2\nscheduler = ""\n')
    Path(workflow_dir, "dask.toml").write_text(_relocated(text, prefix, dask), encoding="utf-8")


def make(outdir) -> dict:
    """Write the catalogue, truth table, band curves and workflow into ``outdir``.

    Returns
    -------
    dict
        Name -> path of every file written.
    """
    rng = np.random.default_rng(SEED)
    outdir = Path(outdir)
    (outdir / "bands").mkdir(parents=True, exist_ok=True)
    n = N_SOURCES
    ids = np.array([f"VAR-{i + 1:04d}" for i in range(n)])
    pos, sep_pc = _positions(rng, n)
    classes = rng.choice(list(CLASS_FRACTIONS), size=n, p=list(CLASS_FRACTIONS.values()))
    beta = rng.uniform(1.5, 2.1, n)
    log_mass = rng.uniform(-3.5, -2.0, n)  # dust mass, solMass
    t_model, t_true, a_v = _temperatures(rng, sep_pc, beta, classes)
    files = {"catalog": outdir / "demo_catalog.ecsv", "truth": outdir / "demo_truth.ecsv",
             "workflow": outdir / "demo.toml"}
    for name, (lam, width, _) in BANDS.items():
        files[name] = outdir / "bands" / f"{name}.ecsv"
        response_curve(lam, width).write(files[name], format="ascii.ecsv", overwrite=True)
    flux, err = _photometry(rng, np.column_stack([log_mass, t_true, beta]), files)
    missing70 = rng.uniform(size=n) < 0.08
    two_bands = np.zeros(n, bool)
    two_bands[rng.choice(np.arange(10, n), size=3, replace=False)] = True
    cat = Table()
    cat["src"] = ids
    cat["ra"] = pos.ra.to(u.deg)
    cat["dec"] = pos.dec.to(u.deg)
    limit70 = flux[:, 0] < 3 * err[:, 0]
    for j, (name, (lam, _, _)) in enumerate(BANDS.items()):
        w = int(lam)
        f, e = flux[:, j].copy(), err[:, j].copy()
        if name == "k70":
            f[limit70] = 3 * e[limit70]  # a 3-sigma upper limit; error = its sigma
            f[missing70], e[missing70] = np.nan, np.nan
        if j >= 2:  # the two-band sources keep only k70 and k110
            f[two_bands], e[two_bands] = np.nan, np.nan
        cat[f"F{w}"] = np.round(f, 4) * u.mJy
        cat[f"E{w}"] = np.round(e, 4) * u.mJy
        if name == "k70":
            cat["L70"] = limit70 & ~missing70
    truth = Table()
    truth["src"] = ids
    truth["true_class"] = classes
    truth["T_true"] = t_true * u.K
    truth["beta_true"] = beta
    truth["log10_mass_true"] = log_mass * u.dex(u.solMass)
    truth["A_V_true"] = a_v
    truth["separation"] = sep_pc * u.pc
    truth["T_eq_model"] = t_model * u.K
    truth.meta = {"scenario": "invented Varnel cloud; see sample_data/make_demo.py", "seed": SEED}
    cat.write(files["catalog"], format="ascii.ecsv", overwrite=True)
    truth.write(files["truth"], format="ascii.ecsv", overwrite=True)
    files["workflow"].write_text(WORKFLOW.format(bands=_bands_toml()), encoding="utf-8")
    return files


def main(argv=None):
    here = Path(__file__).resolve().parent
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--output", type=Path, default=here.parent / "sedtemp" / "data" / "demo")
    p.add_argument("--workflows", type=Path, default=here.parent / "workflows",
                   help="also write demo.toml and dask.toml here, with paths to --output")
    args = p.parse_args(argv)
    for name, path in make(args.output).items():
        print(f"{name}: {path}")
    args.workflows.mkdir(parents=True, exist_ok=True)
    write_workflows(args.output, args.workflows)


if __name__ == "__main__":
    main()
