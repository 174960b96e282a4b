"""Physics and uncertainty review: each test pins a defect found in review (it failed before the
fix) and the behaviour users rely on after it."""

from __future__ import annotations

import math

import pytest
import scipy.constants
from _sequencer_helpers import ideal_session, make_plan, plan_dict

from noisebench.running.corrections import resolve_corrections
from noisebench.running.plan import parse_plan
from noisebench.running.sequencer import Sequencer
from noisebench.science.density import NoiseDensity
from noisebench.science.enr import EnrTable
from noisebench.science.methods.yfactor import calibrate_point, y_factor_point
from noisebench.science.uncertainty import UncertaintyInputs, budget_for_point

K_B = scipy.constants.k  # scipy.constants
T0 = 290.0  # docs/references.md §1 (IRE/IEEE Std 161)
FREQ_HZ = 2e9


def _density(w_per_hz: float, rel_u: float = 0.01) -> NoiseDensity:
    return NoiseDensity(
        freq_hz=FREQ_HZ, density_w_per_hz=w_per_hz, u_density_w_per_hz=rel_u * w_per_hz
    )


def _plan_with_table(tmp_path, table: EnrTable, source_temperature_k: float):
    path = tmp_path / "enr.csv"
    table.to_csv(path)
    plan = make_plan(
        "y_factor",
        freqs_hz=[FREQ_HZ],
        enr={"table": str(path)},
        corrections={"input_loss": 0.0, "source_temperature_k": source_temperature_k},
    )
    return plan, ideal_session(plan)


# ----------------------------------------------------------- ENR table's enr_reference is used


def test_sequencer_uses_the_enr_reference_the_table_declares(tmp_path):
    # An ENR table whose header says "# enr_reference: absolute" defines Th = T0 (ENR + 1)
    # whatever the source's physical temperature (docs/references.md §5, general form). Before the
    # fix the sequencer ignored the header and used Th = T0 ENR + Tc.
    tc = 300.0
    enr_db = 15.0
    table = EnrTable(
        freq_hz=[1e9, 3e9], enr_db=[enr_db, enr_db], metadata={"enr_reference": "absolute"}
    )
    plan, session = _plan_with_table(tmp_path, table, tc)
    seq = Sequencer(plan, session)
    seq.corrections = resolve_corrections(plan, session)
    assert seq.corrections.enr_reference == "absolute"

    th = T0 * (10 ** (enr_db / 10) + 1.0)  # docs/references.md §5: ENR = (Th - T0)/T0
    te2 = 4306.19  # any system noise temperature
    hot, cold = _density(K_B * (th + te2)), _density(K_B * (tc + te2))
    cal = seq._system_point(FREQ_HZ, hot, cold)
    assert cal.enr_reference == "absolute"
    # docs/references.md §5: Te = (Th - Y Tc)/(Y - 1), exact for any Th, Tc
    assert cal.te_k == pytest.approx(te2, rel=1e-9)


def test_tables_without_enr_reference_keep_the_common_t0_convention(tmp_path):
    table = EnrTable(freq_hz=[1e9, 3e9], enr_db=[15.0, 15.0])
    plan, session = _plan_with_table(tmp_path, table, 300.0)
    assert resolve_corrections(plan, session).enr_reference == "t0"


# ----------------------------------------------------------- an unknown ENR u is not "0 dB"


def _y_point(u_enr_db):
    # docs/references.md §5 worked example: ENR 15 dB, G1 = 20 dB, NF1 = 2 dB, NF2 = 12 dB, Tc = T0
    enr = 10**1.5
    th, g1 = T0 * enr + T0, 100.0
    te1, te2 = T0 * (10**0.2 - 1), T0 * (10**1.2 - 1)
    cal = calibrate_point(
        _density(K_B * (th + te2)),
        _density(K_B * (T0 + te2)),
        15.0,
        cold_temperature_k=T0,
        u_enr_db=u_enr_db,
    )
    point = y_factor_point(
        _density(K_B * ((th + te1) * g1 + te2)),
        _density(K_B * ((T0 + te1) * g1 + te2)),
        15.0,
        cold_temperature_k=T0,
        calibration=cal,
        u_enr_db=u_enr_db,
    )
    return point, cal


def test_enr_table_without_uncertainty_gives_none_not_zero(tmp_path):
    table = EnrTable(freq_hz=[1e9, 3e9], enr_db=[15.0, 15.0])
    plan, session = _plan_with_table(tmp_path, table, 296.0)
    enr_db, u_enr_db, extrapolated = resolve_corrections(plan, session).enr_at(FREQ_HZ)
    assert enr_db == 15.0 and not extrapolated
    assert u_enr_db is None  # before the fix: 0.0, i.e. "the ENR is exact"


def test_unknown_enr_uncertainty_is_listed_as_omitted_in_the_budget():
    point, cal = _y_point(None)
    assert point.nf_db == pytest.approx(2.0, abs=1e-9)  # docs/references.md §5
    assert point.notes["u_enr_db"] is None
    budget = budget_for_point(point, UncertaintyInputs(), calibration=cal)
    names = [c.name for c in budget.contributions]
    assert "ENR" not in names
    assert any(o.startswith("ENR") for o in budget.omitted)


def test_known_enr_uncertainty_still_enters_the_budget():
    point, cal = _y_point(0.10)
    budget = budget_for_point(point, UncertaintyInputs(), calibration=cal)
    enr = budget.contribution("ENR")
    # docs/references.md §9: dNF/dENR = 0.9937 dB/dB for the §5 example (same source, correlated)
    assert enr.contribution_db == pytest.approx(0.0994, abs=5e-5)
    assert not any(o.startswith("ENR") for o in budget.omitted)
    assert math.isclose(point.notes["u_enr_db"], 0.10)


# ----------------------------------------------------------- gain method: losses the gain holds


def _gain_point(dut_gain_db: float, loss_in_db: float, loss_out_db: float, **gain_kwargs):
    """Gain-method point of an ideal chain [termination 296 K, input loss, DUT, output loss,
    analyzer], both losses at 296 K; DUT NF 2 dB, gain 20 dB; analyzer NF 12 dB."""
    from noisebench.science.methods.gain import gain_method_point

    ts, te_dut, te_sa = 296.0, T0 * (10**0.2 - 1), T0 * (10**1.2 - 1)
    l_in, l_out, g = 10 ** (0.5 / 10), 10 ** (1.0 / 10), 100.0
    t = ts / l_in + (1 - 1 / l_in) * ts  # docs/references.md §3: a matched loss at Tp
    t = (t + te_dut) * g
    t = t / l_out + (1 - 1 / l_out) * ts
    dut, floor = _density(K_B * (t + te_sa)), _density(K_B * (ts + te_sa))
    return gain_method_point(
        dut,
        dut_gain_db,
        floor=floor,
        source_temperature_k=ts,
        input_loss_db=loss_in_db,
        output_loss_db=loss_out_db,
        **gain_kwargs,
    )


def _budget_loss_sensitivities(point):
    inputs = UncertaintyInputs(input_loss_db=0.02, output_loss_db=0.02)
    budget = budget_for_point(point, inputs)
    return (
        budget.contribution("input loss").sensitivity,
        budget.contribution("output loss").sensitivity,
    )


def _method_loss_sensitivities(stated_gain_db: float, **gain_kwargs):
    """dNF/dL (dB/dB) of the method itself when the declared loss is changed, the stated gain
    and the readings held (central difference)."""
    h = 1e-4
    out = []
    for which in ("in", "out"):
        d_in, d_out = (h, 0.0) if which == "in" else (0.0, h)
        up = _gain_point(stated_gain_db, 0.5 + d_in, 1.0 + d_out, **gain_kwargs).nf_db
        down = _gain_point(stated_gain_db, 0.5 - d_in, 1.0 - d_out, **gain_kwargs).nf_db
        out.append((up - down) / (2 * h))
    return out


@pytest.mark.parametrize(
    "stated_gain_db, gain_kwargs",
    [
        (20.0 - 0.5 - 1.0, {}),  # path gain (termination to analyzer): both losses inside
        (20.0, {"gain_includes_losses": False}),  # the DUT's own gain (file or constant)
        (20.0 - 0.5, {"gain_includes_output_loss": False}),  # substitution against a THROUGH
    ],
)
def test_gain_budget_loss_sensitivity_matches_the_method(stated_gain_db, gain_kwargs):
    # JCGM 100:2008 §5.1.3: c_i = df/dx_i of the model the result was computed with. Before
    # the fix the budget always held the path gain fixed, so for a DUT's own gain it gave the
    # input loss ~ -1 dB/dB (truth ~0: a loss at the termination's temperature is still a
    # matched load at that temperature) and the output loss ~0 (truth ~ +1 dB/dB).
    point = _gain_point(stated_gain_db, 0.5, 1.0, **gain_kwargs)
    assert point.nf_db == pytest.approx(2.0, abs=1e-9)
    assert point.gain_db == pytest.approx(20.0, abs=1e-9)
    expected = _method_loss_sensitivities(stated_gain_db, **gain_kwargs)
    got = _budget_loss_sensitivities(point)
    assert got == pytest.approx(expected, abs=1e-4)


def test_sequencer_records_that_a_constant_gain_is_the_duts_own(tmp_path):
    # plan: [gain] source = "constant" is the DUT's own gain, so neither cable was in it
    plan = make_plan("gain", freqs_hz=[FREQ_HZ])
    session = ideal_session(plan, seed=2)
    record = Sequencer(plan, session).run(tmp_path / "run")
    (point,) = record.points
    assert point.notes["gain_includes_input_loss"] is False
    assert point.notes["gain_includes_output_loss"] is False
    truth = session.sim.truth([FREQ_HZ])
    assert point.gain_db == pytest.approx(float(truth["gain_db"][0]), abs=1e-6)
    # u is a standard uncertainty: within 4 u of the simulated truth
    assert abs(point.nf_db - float(truth["nf_db"][0])) < 4 * point.u_nf_db


def test_sequencer_records_that_a_measured_gain_holds_the_input_cable_only(tmp_path):
    # the measured gain is DUT / THROUGH: the THROUGH path holds the output cable, so the ratio
    # holds the input cable and the DUT (noisebench.sims.bench: DUT and THROUGH paths)
    data = plan_dict(
        "gain",
        freqs_hz=[FREQ_HZ],
        bench={
            "generator": {"resource": "sim", "max_level_dbm": -10.0},
            "noise_source": {"drive": "none"},
        },
    )
    data["gain"] = {"source": "measure", "max_gain_db": 30.0, "dut_p1db_out_dbm": 14.0}
    plan = parse_plan(data)
    session = ideal_session(plan, seed=2)
    record = Sequencer(plan, session).run(tmp_path / "run")
    (point,) = record.points
    assert point.notes["gain_includes_input_loss"] is True
    assert point.notes["gain_includes_output_loss"] is False
    truth = session.sim.truth([FREQ_HZ])
    assert abs(point.gain_db - float(truth["gain_db"][0])) < 4 * point.u_gain_db
    # u_nf_db_with_gain: the densities' and the measured gain's terms together
    assert abs(point.nf_db - float(truth["nf_db"][0])) < 4 * point.notes["u_nf_db_with_gain"]
