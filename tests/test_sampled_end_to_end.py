"""Noise figure from sampled data end to end: the live simulated sampled receiver and SigMF
recordings through the real sequencer, CLI, run store, report and database.

Bias and coverage: on ideal benches (no systematic errors) over seeds, the normalised errors
z = (NF - truth) / u must scatter like a standard normal: mean within its sampling limit and
mean square within the chi-square limits (family-wise false alarm 1e-4 per test, fixed seeds).
"""

from __future__ import annotations

import json
import math
import sqlite3
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

pytest.importorskip("sigmf")

from _sequencer_helpers import IDEAL_INPUT_LOSS_DB, IDEAL_OUTPUT_LOSS_DB, ideal_sim  # noqa: E402

from noisebench.bench.registry import simulated_enr_table, simulated_session  # noqa: E402
from noisebench.running.plan import parse_plan  # noqa: E402
from noisebench.running.sequencer import run_plan  # noqa: E402
from noisebench.sampled.analyzer import SampledAnalyzer  # noqa: E402
from noisebench.sims.bench import SimulatedBench  # noqa: E402
from noisebench.sims.samples import SimSampleReceiver, calibrate_tone_scale, record_sigmf  # noqa: E402

FREQS_HZ = (1.0e9, 2.0e9, 3.0e9)
FAMILY_FALSE_ALARM = 1e-4


def _acquisition(target: float, time_limit_s: float) -> dict:
    return {
        "rbw_hz": 10e3,
        "span_hz": 400e3,
        "target_u_nf_db": target,
        "time_limit_s": time_limit_s,
        "min_averages": 20,
    }


def _plan(method: str, analyzer: dict, enr_csv: Path | None, **extra) -> dict:
    data = {
        "method": method,
        "dut": {"id": "SAMPLED-E2E"},
        "bench": {"analyzer": analyzer},
        "acquisition": _acquisition(0.1, 2.0),
        "sweep": {"freqs_hz": list(FREQS_HZ)},
        "corrections": {"source_temperature_k": "bench"},
        "expect": {"dut_gain_db": 20.0},
        "output": {"folder": "runs", "plots": False, "report": False},
    }
    if enr_csv is not None:
        data["enr"] = {"table": str(enr_csv)}
    data.update(extra)
    return data


BENCH_TEMPERATURE_K = 296.0


def _ideal(seed: int) -> SimulatedBench:
    """demo-lna whose truth the methods can recover exactly (the sequencer tests' overrides:
    no ENR error, no reflections, flat declared cable losses), every temperature equal."""
    return ideal_sim(
        seed,
        ambient_k=BENCH_TEMPERATURE_K,
        noise_source__physical_temperature_k=BENCH_TEMPERATURE_K,
    )


def _sampled_session(sim: SimulatedBench, plan, seed: int):
    analyzer = SampledAnalyzer(SimSampleReceiver(sim, seed=seed))
    return simulated_session(sim, plan.bench, analyzer=analyzer)


def test_live_sampled_y_factor_bias_and_coverage(tmp_path):
    seeds = range(1, 9)
    data = _plan("y_factor", {"resource": "sim://demo-lna?seed=1&receiver=sampled"}, None)
    data["corrections"] = {
        "input_loss": IDEAL_INPUT_LOSS_DB,
        "source_temperature_k": BENCH_TEMPERATURE_K,
    }
    plan = parse_plan(data)
    z = []
    for seed in seeds:
        sim = _ideal(seed)
        record, _ = run_plan(
            plan,
            folder=tmp_path / f"s{seed}",
            outputs=False,
            session=_sampled_session(sim, plan, seed),
        )
        truth = sim.truth(list(FREQS_HZ))["nf_db"]
        for point, nf in zip(record.points, truth, strict=True):
            z.append((point.nf_db - nf) / point.u_nf_db)
    z = np.asarray(z)
    n = z.size
    # reference: normal and chi-square sampling distributions (scipy.stats), 1e-4 per check
    assert abs(z.mean()) < stats.norm.isf(FAMILY_FALSE_ALARM / 2) / math.sqrt(n), z.mean()
    lo, hi = stats.chi2.ppf([FAMILY_FALSE_ALARM / 2, 1 - FAMILY_FALSE_ALARM / 2], n) / n
    assert lo < float(np.mean(z**2)) < hi, np.mean(z**2)


def _coverage_checks(z: np.ndarray) -> None:
    n = z.size
    # reference: normal and chi-square sampling distributions (scipy.stats), 1e-4 per check
    assert abs(z.mean()) < stats.norm.isf(FAMILY_FALSE_ALARM / 2) / math.sqrt(n), z.mean()
    lo, hi = stats.chi2.ppf([FAMILY_FALSE_ALARM / 2, 1 - FAMILY_FALSE_ALARM / 2], n) / n
    assert lo < float(np.mean(z**2)) < hi, np.mean(z**2)


def test_live_sampled_gain_method_bias_and_coverage(tmp_path):
    """The gain method on the live simulated sampled receiver: it reads absolute densities,
    so it relies on the receiver's scale (declared by the simulated source) and measures the
    DUT gain with the generator's tone through the same sampled analyzer. Over fixed seeds
    the normalised errors against the simulator's truth, z = (NF - truth) / u with u the
    standard uncertainty including the measured gain's, scatter like N(0, 1): mean within
    its sampling limit, mean square within the chi-square limits (1e-4 per check)."""
    seeds = range(1, 9)
    data = _plan("gain", {"resource": "sim://demo-lna?seed=1&receiver=sampled"}, None)
    data["corrections"] = {
        "input_loss": IDEAL_INPUT_LOSS_DB,
        "output_loss": IDEAL_OUTPUT_LOSS_DB,
        "source_temperature_k": BENCH_TEMPERATURE_K,
    }
    data["bench"]["generator"] = {"resource": "sim", "max_level_dbm": -10.0}
    data["bench"]["noise_source"] = {"drive": "none"}
    data["gain"] = {"source": "measure", "max_gain_db": 30.0, "dut_p1db_out_dbm": 14.0}
    plan = parse_plan(data)
    z = []
    for seed in seeds:
        sim = _ideal(seed)
        record, _ = run_plan(
            plan,
            folder=tmp_path / f"s{seed}",
            outputs=False,
            session=_sampled_session(sim, plan, seed),
        )
        assert len(record.points) == len(FREQS_HZ)
        truth = sim.truth(list(FREQS_HZ))
        for point, nf, gain in zip(record.points, truth["nf_db"], truth["gain_db"], strict=True):
            assert point.method.value == "gain"
            # the gain the tone measured through the sampled analyzer, within its own u
            assert abs(point.gain_db - gain) < 5 * point.u_gain_db, (point.gain_db, gain)
            u = float(point.notes.get("u_nf_db_with_gain", point.u_nf_db))
            z.append((point.nf_db - nf) / u)
    _coverage_checks(np.asarray(z))


@pytest.fixture(scope="module")
def recordings(tmp_path_factory):
    """demo-lna seed 1 (with its ENR calibration error and reflections: a realistic bench),
    recorded as SigMF with a tone scale calibration, plus the operator's ENR table."""
    folder = tmp_path_factory.mktemp("sigmf")
    sim = SimulatedBench.from_scenario("demo-lna", seed=1)
    rx = SimSampleReceiver(sim, seed=1)
    scale = calibrate_tone_scale(rx, 1.5e9, -60.0)
    record_sigmf(rx, folder / "recs", FREQS_HZ, samples_per_state=600_000, scale=scale)
    simulated_enr_table(sim).to_csv(folder / "enr.csv")
    scale.save(folder / "scale.json")
    # the DUT gain and output cable loss as a network analyzer would have measured them
    truth = sim.truth(list(FREQS_HZ))
    for name, column in (("dut_gain.csv", "gain_db"), ("output_loss.csv", "output_loss_db")):
        head = "gain_db,u_gain_db" if column == "gain_db" else "loss_db,u_loss_db"
        rows = [f"{f:.6g},{v:.4f},0.02" for f, v in zip(FREQS_HZ, truth[column], strict=True)]
        (folder / name).write_text("freq_hz," + head + "\n" + "\n".join(rows) + "\n")
    return folder, sim


def _run_cli(args) -> int:
    from noisebench.frontends.cli import main

    return main([str(a) for a in args])


def _write_plan(path: Path, text: str) -> Path:
    path.write_text(text, encoding="utf-8")
    return path


RECORDED_YF = """\
method = "y_factor"
[dut]
id = "SAMPLED-E2E"
[bench]
analyzer = {{ resource = "sigmf://recs" }}
[acquisition]
rbw_hz = 10e3
span_hz = 400e3
target_u_nf_db = 0.1
time_limit_s = 0.3
min_averages = 20
[sweep]
freqs_hz = [1e9, 2e9, 3e9]
[enr]
table = "enr.csv"
[corrections]
source_temperature_k = "bench"
[expect]
dut_gain_db = 20.0
[output]
folder = "{out}"
"""

RECORDED_GAIN = """\
method = "gain"
[dut]
id = "SAMPLED-E2E"
[bench]
analyzer = {{ resource = "sigmf://recs{query}" }}
[acquisition]
rbw_hz = 10e3
span_hz = 400e3
target_u_nf_db = 0.1
time_limit_s = 0.3
min_averages = 20
[sweep]
freqs_hz = [1e9, 2e9, 3e9]
[gain]
source = "file"
file = "dut_gain.csv"
[corrections]
source_temperature_k = "bench"
output_loss = "output_loss.csv"
[expect]
dut_gain_db = 20.0
[uncertainty]
linearity_db = 0.02
[output]
folder = "{out}"
"""


def _only_run(folder: Path) -> Path:
    (run,) = [p for p in folder.iterdir() if p.is_dir()]
    return run


def test_recordings_y_factor_through_the_cli(recordings, tmp_path):
    folder, sim = recordings
    plan = _write_plan(folder / "yf.toml", RECORDED_YF.format(out=tmp_path / "runs"))
    assert _run_cli(["run", plan]) == 0
    run = _only_run(tmp_path / "runs")
    names = {p.name for p in run.iterdir()}
    assert {"run.json", "points.jsonl", "results.json", "results.csv", "report.html"} <= names
    results = json.loads((run / "results.json").read_text())
    info = json.loads((run / "run.json").read_text())
    notes = info["notes"]["sampled_receiver"]
    assert notes["absolute_scale"] is True and notes["captures"] > 0
    assert "the gain method needs the receiver's absolute scale" in notes["level_note"]
    assert info["notes"]["bench_kind"] == "recorded"
    truth = sim.truth(list(FREQS_HZ))
    points = results["points"]
    assert [p["freq_hz"] for p in points] == list(FREQS_HZ)
    for p, nf in zip(points, truth["nf_db"], strict=True):
        # this bench has its ENR table error and reflections: compare with the full U the
        # run states, which carries them (k = 2)
        u = p["notes"].get("u_nf_db_with_enr", p["u_nf_db"])
        assert abs(p["nf_db"] - nf) < 4 * u, (p["freq_hz"], p["nf_db"], nf, u)
    # the LO leakage guard at each recording's centre is reported like a spur
    assert all("spurs_excluded" in p["flags"] for p in points)
    report = (run / "report.html").read_text()
    assert "sampled_receiver" in report and "level_note" in report


def test_recordings_gain_method_and_database_rows(recordings, tmp_path):
    folder, sim = recordings
    plan = _write_plan(folder / "gain.toml", RECORDED_GAIN.format(out=tmp_path / "runs", query=""))
    assert _run_cli(["run", plan]) == 0
    run = _only_run(tmp_path / "runs")
    # the budget takes the receiver scale's own uncertainty as the absolute-level term
    results = json.loads((run / "results.json").read_text())
    for budget in results["budgets"]:
        names = [c["name"] for c in budget["contributions"]]
        assert "absolute amplitude" in names, names
    db = tmp_path / "nb.sqlite"
    assert _run_cli(["db", "import", run, "--db", f"sqlite:///{db}"]) == 0
    with sqlite3.connect(db) as con:
        tables = [r[0] for r in con.execute("select name from sqlite_master where type='table'")]
        point_table = next(t for t in tables if "point" in t)
        rows = con.execute(f"select count(*) from {point_table}").fetchone()[0]
    assert rows == len(FREQS_HZ)


def test_gain_method_refused_without_an_absolute_scale(recordings, tmp_path, capsys):
    folder, _ = recordings
    unscaled = folder / "unscaled"
    if not unscaled.exists():
        from noisebench.sampled.sigmf_io import SigmfRecordings, write_recording

        unscaled.mkdir()
        recs = SigmfRecordings(folder / "recs")
        blocks = []
        for r in recs.ranges:
            if r.center_hz == 2e9:
                from noisebench.sampled.source import SampleBlock

                x = r.handle.read_samples(r.start, 50_000)
                blocks.append(
                    (
                        SampleBlock(
                            samples=x, sample_rate_hz=recs.sample_rate_hz, center_hz=r.center_hz
                        ),
                        r.connection,
                        r.state,
                    )
                )
        write_recording(unscaled / "r", blocks, cold_temperature_k=recs.cold_temperature_k)
    text = RECORDED_GAIN.format(out=tmp_path / "runs", query="")
    text = (
        text.replace("sigmf://recs", "sigmf://unscaled")
        .replace("freqs_hz = [1e9, 2e9, 3e9]", "freqs_hz = [2e9]")
        .replace("time_limit_s = 0.3", "time_limit_s = 0.02")
    )
    plan = _write_plan(folder / "gain_unscaled.toml", text)
    assert _run_cli(["run", plan]) != 0
    err = capsys.readouterr().err
    assert "the gain method reads absolute noise densities" in err
    assert "the Y-factor method needs only ratios" in err
    # the same recordings with a scale file work
    text = text.replace("sigmf://unscaled", "sigmf://unscaled?scale=scale.json").replace(
        str(tmp_path / "runs"), str(tmp_path / "runs_scaled")
    )
    plan = _write_plan(folder / "gain_scaled.toml", text)
    assert _run_cli(["run", plan]) == 0


def test_plan_checks_for_sampled_addresses(tmp_path):
    base = _plan("y_factor", {"resource": "sigmf://nowhere"}, None)
    base["enr"] = {"table": "missing.csv"}
    with pytest.raises(Exception) as info:
        parse_plan(base, base_dir=tmp_path, check_files=False)
    assert "bench.analyzer.resource: no recordings folder" in str(info.value)
    bad = _plan("y_factor", {"resource": "sigmf://x?window=kaiser"}, None)
    with pytest.raises(Exception, match="unknown or unsupported window 'kaiser'"):
        parse_plan(bad, base_dir=tmp_path, check_files=False)
    live = _plan("y_factor", {"resource": "samples://lab-sdr"}, None)
    with pytest.raises(Exception, match="has no noise-source drive output"):
        parse_plan(live, base_dir=tmp_path, check_files=False)
    sim = _plan("y_factor", {"resource": "sim://demo-lna?seed=1&receiver=sdr"}, None)
    with pytest.raises(Exception, match="receiver='sdr'"):
        parse_plan(sim, base_dir=tmp_path, check_files=False)


def test_plan_refuses_a_time_limit_the_recordings_cannot_hold(recordings):
    folder, _ = recordings
    text = RECORDED_YF.format(out=folder / "runs").replace("time_limit_s = 0.3", "time_limit_s = 2")
    plan = _write_plan(folder / "long.toml", text)
    from noisebench.running.plan import load_plan

    with pytest.raises(Exception) as info:
        load_plan(plan)
    lines = str(info.value)
    assert "acquisition.time_limit_s: the points at 1 GHz may read 2 s of each state" in lines
    assert "the recordings hold 0.3 s" in lines and "record longer" in lines
