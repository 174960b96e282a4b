"""The sampled-data examples (``examples/sampled/``) run as a user runs them, as they are: on a
copy in a temporary folder, ``make_recordings.py`` writes the simulated SigMF recordings, then
``noisebench run`` measures each of the four plans (recordings and live simulated receiver,
Y-factor and gain method). Every point must lie within its stated uncertainty of the
simulator's truth (demo-lna, seed 1, the bench every example names).

Tolerance: the run states a standard uncertainty per point, including the ENR table's
(Y-factor, ``u_nf_db_with_enr``) or the DUT gain's (gain method, ``u_nf_db_with_gain``);
|NF - truth| <= z u with z the normal quantile for a family-wise false alarm of 1e-4 over the
16 points (scipy.stats; z = 4.4). The examples run with their own settings (about 12 s here,
most of it writing the recordings): no option shortens them, and the plans are what the README
tells users to run.
"""

from __future__ import annotations

import json
import runpy
import shutil
from pathlib import Path

import pytest
from scipy import stats

pytest.importorskip("sigmf")

from noisebench.frontends.cli import main  # noqa: E402
from noisebench.sims.bench import SimulatedBench  # noqa: E402

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"
PLANS = ("yfactor_recordings", "gain_recordings", "yfactor_live_sampled", "gain_live_sampled")
FAMILY_FALSE_ALARM = 1e-4
POINTS_PER_PLAN = 4


@pytest.fixture(scope="module")
def copied(tmp_path_factory) -> Path:
    """examples/sampled and the cable tables its plans name (../*.csv), with the recordings
    written by the example's own script."""
    root = tmp_path_factory.mktemp("examples")
    folder = root / "sampled"
    shutil.copytree(
        EXAMPLES / "sampled", folder, ignore=shutil.ignore_patterns("recordings", "runs")
    )
    for name in ("input_cable.csv", "output_cable.csv"):
        shutil.copy(EXAMPLES / name, root / name)
    runpy.run_path(str(folder / "make_recordings.py"), run_name="__main__")
    assert len(list((folder / "recordings").glob("*.sigmf-meta"))) == POINTS_PER_PLAN
    return folder


@pytest.mark.parametrize("name", PLANS)
def test_sampled_example_measures_the_truth(copied, name, monkeypatch):
    monkeypatch.chdir(copied)
    out = copied / "runs" / name
    assert main(["-q", "run", f"{name}.toml", "--out", str(out)]) == 0
    results = json.loads((out / "results.json").read_text(encoding="utf-8"))
    points = results["points"]
    assert len(points) == POINTS_PER_PLAN
    assert (out / "report.html").is_file()
    truth = SimulatedBench.from_scenario("demo-lna", seed=1).truth([p["freq_hz"] for p in points])
    z_limit = stats.norm.isf(FAMILY_FALSE_ALARM / (2 * len(PLANS) * POINTS_PER_PLAN))
    for p, nf in zip(points, truth["nf_db"], strict=True):
        notes = p["notes"]
        u = float(notes.get("u_nf_db_with_enr", notes.get("u_nf_db_with_gain", p["u_nf_db"])))
        assert u >= p["u_nf_db"]
        assert abs(p["nf_db"] - nf) <= z_limit * u, (name, p["freq_hz"], p["nf_db"], nf, u)
