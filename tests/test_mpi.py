"""The MPI executor (mpi4py.futures) gives the same results as a serial run.

Skipped where mpi4py or an MPI launcher is missing (``pip install "sedtemp[mpi]"``
plus an MPI runtime such as Open MPI).
"""

import os
import shutil
import subprocess
import sys
from importlib import resources

import numpy as np
import pytest
from astropy.table import Table

# only the top-level package: importing mpi4py.futures/MPI here would start MPI in
# this process, and a launcher started from an MPI process refuses to run
pytest.importorskip("mpi4py")
MPIEXEC = shutil.which("mpiexec")
pytestmark = pytest.mark.skipif(MPIEXEC is None, reason="no mpiexec on PATH")


def _workflow(tmp_path, executor):
    demo = resources.files("sedtemp") / "data" / "demo"
    cat = Table.read(demo / "demo_catalog.ecsv")[:12]
    cat.write(tmp_path / "cat.ecsv", overwrite=True)
    text = (demo / "demo.toml").read_text()
    text = text.replace('path = "demo_catalog.ecsv"', f'path = "{tmp_path / "cat.ecsv"}"')
    text = text.replace("[run]\n", f'[run]\nexecutor = "{executor}"\n', 1)
    text = text.replace('source_plots = "flagged"', 'source_plots = "none"\nplots = false')
    path = tmp_path / f"{executor}.toml"
    path.write_text(text.replace('response = "bands/', f'response = "{demo}/bands/'))
    return path


def test_mpi_run_equals_serial_run(tmp_path):
    wf_mpi, wf_serial = _workflow(tmp_path, "mpi"), _workflow(tmp_path, "serial")
    cmd = [MPIEXEC, "-n", "2"]
    if sys.platform.startswith("linux"):
        cmd += ["--allow-run-as-root", "--oversubscribe"]  # CI runs as root
    cmd += [sys.executable, "-m", "mpi4py.futures", "-m", "sedtemp", "run", str(wf_mpi), "--quiet",
            "--output", str(tmp_path / "mpi")]
    env = {k: v for k, v in os.environ.items() if not k.startswith(("OMPI_", "PMIX_", "PMI_"))}
    done = subprocess.run(cmd, timeout=600, capture_output=True, text=True, env=env, check=False)
    assert done.returncode == 0, done.stderr[-2000:]
    subprocess.run([sys.executable, "-m", "sedtemp", "run", str(wf_serial), "--quiet",
                    "--output", str(tmp_path / "serial")], check=True, timeout=600, capture_output=True)
    a = Table.read(tmp_path / "mpi" / "results.ecsv")
    b = Table.read(tmp_path / "serial" / "results.ecsv")
    assert len(a) == len(b) == 12 and list(a["src"]) == list(b["src"])
    for col in ("T_median", "beta_p16", "T_eq_point", "p_warmer"):
        np.testing.assert_allclose(np.asarray(a[col]), np.asarray(b[col]), rtol=1e-10, equal_nan=True)
    assert list(a["heating_class"]) == list(b["heating_class"])
