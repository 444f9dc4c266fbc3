"""Start-up: `detect` and `plan` on one photo import only what they use (no matplotlib, SciPy, Dask;
no rich when printing JSON), and the small replacements that made that possible agree with the
libraries they replace."""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest

from tests.conftest import ROOT

PHOTO = ROOT / "sample_images" / "demo" / "demo_01.jpg"
HEAVY = ("matplotlib", "scipy", "dask", "distributed", "pandas", "rich")


def _modules_after(args: list[str]) -> set[str]:
    code = ("import json, sys; from gripsight.app.cli import main; code = main(sys.argv[1:]);"
            "print(json.dumps(sorted({m.split('.')[0] for m in sys.modules})), file=sys.stderr); sys.exit(code)")
    done = subprocess.run([sys.executable, "-c", code, *args], capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr[-2000:]
    return set(json.loads(done.stderr.strip().splitlines()[-1]))


@pytest.mark.slow
def test_detect_json_imports_no_heavy_library():
    loaded = _modules_after(["detect", str(PHOTO), "--json"])
    assert not loaded & set(HEAVY), sorted(loaded & set(HEAVY))


@pytest.mark.slow
def test_plan_imports_no_plotting_or_fitting_library(tmp_path):
    loaded = _modules_after(["plan", str(PHOTO), "--out", str(tmp_path / "out")])
    assert not loaded & {"matplotlib", "scipy", "dask", "distributed", "pandas"}
    assert (tmp_path / "out" / "joints.png").read_bytes()[:4] == b"\x89PNG"


def test_normal_cdf_matches_scipy():
    # reference: scipy.special.ndtr (what the marker edge model called before)
    from scipy.special import ndtr as scipy_ndtr

    from gripsight.vision.markeredges import ndtr

    x = np.linspace(-12, 12, 2001)
    np.testing.assert_allclose(ndtr(x), scipy_ndtr(x), rtol=1e-12, atol=1e-300)
    assert ndtr(np.zeros((3, 1))).shape == (3, 1) and ndtr(np.zeros((3, 1)))[0, 0] == 0.5
