"""Make the invented map demo (the Tamsin cloud) and, optionally, fit it.

    python sample_data/make_map_demo.py OUTDIR            # images, noise maps, truth, map-demo.toml
    python sample_data/make_map_demo.py OUTDIR --fit      # ... and run it (sedtemp demo --maps does this)
    python sample_data/make_map_demo.py OUTDIR --fit --figure sample_data/figures/map_demo.png

Five invented bands (d100 ... d500) with beams of 9 to 36 arcsec on their own
pixel grids; a warm rim facing an invented star just west of the field and a
cold, shielded filament. The truth (T, beta, N(H2)) is in OUTDIR/truth.fits
on the grid of the coarsest band. Nothing here describes a real object.
"""

from __future__ import annotations

import argparse
import json
import shutil
from pathlib import Path

from sedtemp.maps import make_map_demo, run_map_demo
from sedtemp.maps.demo import _write_demo_inputs


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("outdir", type=Path)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--scale", type=float, default=2.0, help="pixel scale factor (1: finest, slowest)")
    ap.add_argument("--fit", action="store_true", help="fit the maps and compare T with the truth")
    ap.add_argument("--figure", type=Path, default=None, help="copy the quick-look figure here")
    args = ap.parse_args(argv)
    if not args.fit:
        _write_demo_inputs(make_map_demo(seed=args.seed, scale=args.scale), args.outdir)
        print(f"wrote {args.outdir / 'map-demo.toml'} and its images")
        return 0
    report = run_map_demo(args.outdir, seed=args.seed, scale=args.scale, progress=True)
    print(json.dumps(report, indent=2))
    if args.figure is not None and "figure" in report:
        args.figure.parent.mkdir(parents=True, exist_ok=True)
        shutil.copyfile(report["figure"], args.figure)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
