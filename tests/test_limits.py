"""Limit masks and verdicts: decision-rule boundaries, bands, flatness, aggregation, bad masks.

Decision rules follow the guarded-acceptance practice of JCGM 106:2012 (guard band = expanded
uncertainty) and the "simple acceptance" (shared risk) rule. The boundary values below are
exactly representable binary fractions, so ``value + U == limit`` holds in floating point.
"""

from __future__ import annotations

import json
import math

import pytest
from hypothesis import given
from hypothesis import strategies as st

from noisebench.errors import InputError
from noisebench.science.limits import (
    DecisionRule,
    LimitBand,
    LimitMask,
    Verdict,
    decide,
    decide_interval,
    judge,
)
from noisebench.science.point import Method, PointResult
from noisebench.science.uncertainty import UncertaintyInputs, gain_method_budget

PASS, FAIL, IND, NOT = Verdict.PASS, Verdict.FAIL, Verdict.INDETERMINATE, Verdict.NOT_JUDGED


def _up(x: float) -> float:
    return math.nextafter(x, math.inf)


def _down(x: float) -> float:
    return math.nextafter(x, -math.inf)


def _point(
    freq_hz: float,
    nf_db: float,
    *,
    gain_db: float | None = 20.0,
    u_nf_db: float = 0.0625,
    u_gain_db: float | None = 0.125,
) -> PointResult:
    return PointResult(
        freq_hz=freq_hz,
        method=Method.GAIN,
        nf_db=nf_db,
        te_k=100.0,
        gain_db=gain_db,
        u_nf_db=u_nf_db,
        u_te_k=1.0,
        u_gain_db=u_gain_db,
    )


def _mask(*bands: dict, **kw) -> LimitMask:
    return LimitMask.from_dict({"bands": list(bands), **kw})


# --------------------------------------------------------------------------- boundaries


def test_guarded_upper_limit_boundaries_are_exact():
    limit, u = 2.0, 0.25
    assert 1.75 + u == limit and 2.25 - u == limit  # exactly representable
    assert decide(1.75, u, limit, "max") is PASS  # value + U == limit -> PASS
    assert decide(1.75, u, _down(limit), "max") is IND  # the limit a hair inside the interval
    assert decide(2.25, u, limit, "max") is IND  # value - U == limit -> not yet FAIL
    assert decide(2.25, u, _down(limit), "max") is FAIL  # value - U > limit -> FAIL
    assert decide(2.0, u, limit, "max") is IND  # on the limit
    assert decide(1.0, 0.0, 1.0, "max") is PASS  # no uncertainty: the limit itself passes
    assert decide(_up(1.0), 0.0, 1.0, "max") is FAIL


def test_guarded_lower_limit_boundaries_mirror_the_upper():
    limit, u = 20.0, 0.5
    assert decide(20.5, u, limit, "min") is PASS  # value - U == limit -> PASS
    assert decide(20.5, u, _up(limit), "min") is IND
    assert decide(19.5, u, limit, "min") is IND  # value + U == limit -> not yet FAIL
    assert decide(19.5, u, _up(limit), "min") is FAIL


def test_simple_rule_ignores_the_uncertainty():
    assert decide(2.0, 0.5, 2.0, "max", "simple") is PASS
    assert decide(_up(2.0), 0.5, 2.0, "max", "simple") is FAIL
    assert decide(1.9, 0.5, 2.0, "max", DecisionRule.SIMPLE) is PASS  # guarded would say I
    assert decide(20.0, 0.5, 20.0, "min", "simple") is PASS
    assert decide(_down(20.0), 0.0, 20.0, "min", "simple") is FAIL


def test_interval_decisions_use_each_end():
    # asymmetric coverage interval [1.5, 2.25] around 1.75 (a Monte Carlo interval, JCGM 101)
    assert decide_interval(1.75, 1.5, 2.0, 2.0, "max") is PASS  # high == limit
    assert decide_interval(1.75, 1.5, 2.25, 2.0, "max") is IND
    assert decide_interval(1.75, 1.5, 2.25, 1.5, "max") is IND  # low == limit: not FAIL
    assert decide_interval(1.75, 1.5, 2.25, _down(1.5), "max") is FAIL
    assert decide_interval(1.75, 1.5, 2.25, 1.5, "min") is PASS  # low == limit
    assert decide_interval(1.75, 1.5, 2.25, 2.25, "min") is IND  # high == limit: not FAIL
    assert decide_interval(1.75, 1.5, 2.25, _up(2.25), "min") is FAIL
    assert decide_interval(1.75, 1.5, 2.25, 1.7, "max", "simple") is FAIL
    with pytest.raises(InputError, match="reversed"):
        decide_interval(1.75, 2.0, 1.5, 2.0, "max")


def test_monte_carlo_budget_interval_is_used_asymmetrically():
    mask = _mask({"start_hz": 1e9, "stop_hz": 2e9, "nf_max_db": 2.0})
    point = _point(1.5e9, 1.75)
    skewed = {
        "freq_hz": 1.5e9,
        "method": "monte_carlo",
        "U_expanded_db": 0.25,
        "k": 2.0,
        "monte_carlo": {"interval_db": [1.375, 1.875]},
    }
    result = judge([point], [skewed], mask)
    # symmetric 1.75 +/- 0.25 would touch 2.0 only at the edge; the interval ends at 1.875
    assert result.points[0].nf_interval_db == (1.375, 1.875)
    assert result.points[0].verdict is PASS
    upper = dict(skewed, monte_carlo={"interval_db": [1.625, 2.125]})
    assert judge([point], [upper], mask).points[0].verdict is IND
    gum = {"freq_hz": 1.5e9, "method": "gum", "U_expanded_db": 0.25, "k": 2.0}
    assert judge([point], [gum], mask).points[0].nf_interval_db == (1.5, 2.0)


def test_decide_refuses_bad_arguments():
    with pytest.raises(InputError, match="expanded"):
        decide(1.0, -0.1, 2.0, "max")
    with pytest.raises(InputError, match="value"):
        decide(float("nan"), 0.1, 2.0, "max")
    with pytest.raises(InputError, match="kind"):
        decide(1.0, 0.1, 2.0, "upper")  # type: ignore[arg-type]
    with pytest.raises(InputError, match="decision_rule"):
        decide(1.0, 0.1, 2.0, "max", "lenient")


@given(
    value=st.floats(-50, 50),
    u=st.floats(0, 5),
    limit=st.floats(-50, 50),
    kind=st.sampled_from(["max", "min"]),
    extra=st.floats(0, 5),
)
def test_guarded_rule_is_never_more_lenient_than_simple(value, u, limit, kind, extra):
    guarded = decide(value, u, limit, kind)
    simple = decide(value, u, limit, kind, "simple")
    if guarded is PASS:
        assert simple is PASS
    if guarded is FAIL:
        assert simple is FAIL
    # a larger uncertainty never turns a verdict into PASS or FAIL
    wider = decide(value, u + extra, limit, kind)
    if wider is not IND:
        assert wider is guarded


# --------------------------------------------------------------------------- judging points


def test_points_outside_every_band_are_not_judged():
    mask = _mask({"start_hz": 1e9, "stop_hz": 2e9, "nf_max_db": 2.0})
    result = judge([_point(1e9, 1.0), _point(2e9, 1.0), _point(2.5e9, 9.0)], [0.25] * 3, mask)
    verdicts = [p.verdict for p in result.points]
    assert verdicts == [PASS, PASS, NOT]  # band edges are inclusive
    assert result.points[2].limit is None and result.points[2].checks == []
    assert result.unit is PASS


def test_overlapping_bands_both_apply():
    mask = _mask(
        {"start_hz": 1e9, "stop_hz": 3e9, "nf_max_db": 3.0},
        {"start_hz": 2e9, "stop_hz": 4e9, "nf_max_db": 2.0, "name": "upper"},
    )
    result = judge([_point(1.5e9, 2.5), _point(2.5e9, 2.5), _point(3.5e9, 1.5)], [0.25] * 3, mask)
    first, overlap, last = result.points
    assert first.verdict is PASS and len(first.checks) == 1
    assert [c.band for c in overlap.checks] == [0, 1]
    assert [c.verdict for c in overlap.checks] == [PASS, FAIL]  # 2.5+0.25 <= 3; 2.5-0.25 > 2
    assert overlap.verdict is FAIL and overlap.limit == 2.0  # the tightest NF limit
    assert last.verdict is PASS
    assert result.unit is FAIL
    assert [b.verdict for b in result.bands] == [PASS, FAIL]
    assert result.bands[1].name == "upper"


def test_gain_limits_use_k_times_the_gain_uncertainty():
    mask = _mask({"start_hz": 1e9, "stop_hz": 2e9, "gain_min_db": 19.75, "gain_max_db": 21.0})
    # U_gain = 2 * 0.125 = 0.25: 20.0 - 0.25 == 19.75 -> PASS on the lower limit
    result = judge([_point(1e9, 1.0, gain_db=20.0)], None, mask)
    checks = result.points[0].checks
    assert [(c.kind, c.verdict) for c in checks] == [("min", PASS), ("max", PASS)]
    assert checks[0].U == 0.25 and result.points[0].U_gain_db == 0.25
    # the budget's k is used for the gain too
    result = judge([_point(1e9, 1.0, gain_db=20.0)], [{"U_expanded_db": 0.3, "k": 3.0}], mask)
    assert result.points[0].checks[0].U == pytest.approx(0.375)
    assert result.points[0].checks[0].verdict is IND


def test_missing_gain_makes_a_gain_limit_indeterminate():
    mask = _mask({"start_hz": 1e9, "stop_hz": 2e9, "nf_max_db": 5.0, "gain_min_db": 10.0})
    result = judge([_point(1.5e9, 1.0, gain_db=None, u_gain_db=None)], [0.1], mask)
    gain_check = [c for c in result.points[0].checks if c.quantity == "gain_db"][0]
    assert gain_check.verdict is IND and gain_check.value is None
    assert "not measured" in gain_check.note
    assert result.unit is IND


def test_flatness_per_band():
    band = {"start_hz": 1e9, "stop_hz": 2e9, "flatness_db": 1.0}
    pts = [
        _point(1e9, 1, gain_db=20.0, u_gain_db=0.15),
        _point(1.5e9, 1, gain_db=20.25),
        _point(2e9, 1, gain_db=20.5, u_gain_db=0.2),
    ]
    result = judge(pts, None, _mask(band))
    flat = result.bands[0].flatness
    assert flat.value == pytest.approx(0.5)
    # U of a difference of the two extreme gains (independent): hypot(2*0.2, 2*0.15) = 0.5
    assert flat.U == pytest.approx(0.5)
    assert flat.verdict is PASS and result.unit is PASS  # 0.5 + 0.5 == 1.0
    tight = judge(pts, None, _mask({**band, "flatness_db": 0.75}))
    assert tight.bands[0].flatness.verdict is IND and tight.unit is IND
    fail = judge(pts, None, _mask({**band, "flatness_db": 0.25}), rule="simple")
    assert fail.bands[0].flatness.verdict is FAIL and fail.unit is FAIL
    # per-point verdicts are not touched by a band-level flatness failure
    assert all(p.verdict is NOT for p in fail.points)
    lonely = judge(pts[:1], None, _mask(band))
    assert lonely.bands[0].flatness.verdict is IND
    assert ">= 2 measured gains" in lonely.bands[0].flatness.note


def test_unit_aggregation():
    mask = _mask({"start_hz": 1e9, "stop_hz": 3e9, "nf_max_db": 2.0})
    ok, unsure, bad = _point(1e9, 1.5), _point(2e9, 1.9), _point(3e9, 2.5)
    u = {1e9: 0.25, 2e9: 0.25, 3e9: 0.25}  # a mapping keyed by frequency
    assert judge([ok], u, mask).unit is PASS
    assert judge([ok, unsure], u, mask).unit is IND
    assert judge([ok, unsure, bad], u, mask).unit is FAIL
    assert judge([bad, ok], u, mask).unit is FAIL


def test_uncovered_band_and_nothing_judged():
    mask = _mask(
        {"start_hz": 1e9, "stop_hz": 2e9, "nf_max_db": 2.0},
        {"start_hz": 5e9, "stop_hz": 6e9, "nf_max_db": 3.0},
    )
    result = judge([_point(1.5e9, 1.0)], [0.1], mask)
    assert result.bands[1].points == 0 and result.bands[1].verdict is IND
    assert result.unit is IND and any("holds no measured point" in n for n in result.notes)
    relaxed = judge(
        [_point(1.5e9, 1.0)],
        [0.1],
        _mask(*[b.model_dump() for b in mask.bands], require_coverage=False),
    )
    assert relaxed.unit is PASS and relaxed.bands[1].verdict is NOT
    nothing = judge(
        [_point(9e9, 1.0)],
        [0.1],
        relaxed_mask := _mask(
            {"start_hz": 1e9, "stop_hz": 2e9, "nf_max_db": 2.0}, require_coverage=False
        ),
    )
    assert nothing.unit is IND and "no measured point lies inside any band" in nothing.notes
    assert relaxed_mask.require_coverage is False


def test_uncertainty_sources():
    mask = _mask({"start_hz": 1e9, "stop_hz": 2e9, "nf_max_db": 2.0})
    point = _point(1.5e9, 1.875, u_nf_db=0.0625)
    # no budget: U = 2 * u_nf_db = 0.125 -> 1.875 + 0.125 == 2.0 -> PASS, with a note
    result = judge([point], None, mask)
    assert result.points[0].U_nf_db == 0.125 and result.unit is PASS
    assert any("statistical part only" in n for n in result.notes)
    assert judge([point], None, mask, coverage_factor=3.0).unit is IND
    # a real Budget object
    n_dut = 1.380649e-23 * 100.0 * (290.0 + 500.0)
    budget = gain_method_budget(
        freq_hz=1.5e9, dut_w_per_hz=n_dut, gain_db=20.0, u_gain_db=0.1, inputs=UncertaintyInputs()
    )
    result = judge([point], [budget], mask)
    assert result.points[0].U_nf_db == pytest.approx(budget.U_expanded_db)
    assert result.points[0].verdict is IND  # 1.875 + 0.2 > 2
    assert judge([point], [budget.to_dict()], mask).points[0].U_nf_db == budget.U_expanded_db
    with pytest.raises(InputError, match="2 entries for 1 points"):
        judge([point], [0.1, 0.1], mask)
    with pytest.raises(InputError, match="given for the point"):
        judge([point], [{"freq_hz": 2e9, "U_expanded_db": 0.1}], mask)
    with pytest.raises(InputError, match="finite number >= 0"):
        judge([point], [float("inf")], mask)
    with pytest.raises(InputError, match="neither a budget nor a number"):
        judge([point], ["0.1"], mask)


def test_rule_from_mask_and_override():
    mask = _mask({"start_hz": 1e9, "stop_hz": 2e9, "nf_max_db": 2.0}, decision_rule="simple")
    point = _point(1.5e9, 1.95)
    assert judge([point], [0.25], mask).unit is PASS
    assert judge([point], [0.25], mask, rule="guarded").unit is IND
    assert mask.judge([point], [0.25]).rule is DecisionRule.SIMPLE


def test_verdict_dict_has_the_stored_shape():
    mask = _mask(
        {"start_hz": 1e9, "stop_hz": 2e9, "nf_max_db": 2.0, "gain_min_db": 15.0},
        {"start_hz": 2e9, "stop_hz": 3e9, "gain_max_db": 25.0, "flatness_db": 2.0},
    )
    data = judge([_point(1e9, 1.5), _point(2.5e9, 1.5), _point(3e9, 1.4)], None, mask).to_dict()
    json.dumps(data, allow_nan=False)
    assert data["unit"] == "pass"
    assert [p["verdict"] for p in data["points"]] == ["pass", "pass", "pass"]
    assert data["points"][0]["limit"] == 2.0 and data["points"][1]["limit"] is None
    assert {"freq_hz", "verdict", "limit", "checks"} <= set(data["points"][0])
    # limit lines as the plots read them: band dicts with the limit keys
    assert data["limits"][0] == {
        "start_hz": 1e9,
        "stop_hz": 2e9,
        "nf_max_db": 2.0,
        "gain_min_db": 15.0,
    }
    assert data["limits"][1]["gain_max_db"] == 25.0
    assert data["bands"][1]["flatness"]["value"] == pytest.approx(0.0)


# --------------------------------------------------------------------------- bad masks


@pytest.mark.parametrize(
    "bands, field",
    [
        ([{"start_hz": 2e9, "stop_hz": 1e9, "nf_max_db": 2.0}], "limits.bands[0].stop_hz"),
        ([{"start_hz": 1e9, "stop_hz": 1e9, "nf_max_db": 2.0}], "limits.bands[0].stop_hz"),
        (
            [
                {"start_hz": 1e9, "stop_hz": 2e9, "nf_max_db": 2.0},
                {"start_hz": 1e9, "stop_hz": 2e9},
            ],
            "limits.bands[1]",
        ),
        (
            [{"start_hz": 1e9, "stop_hz": 2e9, "gain_min_db": 20.0, "gain_max_db": 10.0}],
            "limits.bands[0].gain_max_db",
        ),
        ([{"start_hz": 1e9, "stop_hz": 2e9, "flatness_db": 0.0}], "limits.bands[0].flatness_db"),
        (
            [{"start_hz": 1e9, "stop_hz": 2e9, "nf_max_db": float("nan")}],
            "limits.bands[0].nf_max_db",
        ),
        ([{"start_hz": -1.0, "stop_hz": 2e9, "nf_max_db": 2.0}], "limits.bands[0].start_hz"),
        ([{"start_hz": 1e9, "stop_hz": 2e9, "nf_max": 2.0}], "limits.bands[0].nf_max"),
        ([], "limits.bands"),
    ],
)
def test_bad_masks_name_the_key(bands, field):
    with pytest.raises(InputError) as info:
        LimitMask.from_dict({"bands": bands})
    assert info.value.field == field


def test_bad_mask_tables():
    with pytest.raises(InputError) as info:
        LimitMask.from_dict(
            {
                "bands": [{"start_hz": 1e9, "stop_hz": 2e9, "nf_max_db": 2}],
                "decision_rule": "lenient",
            }
        )
    assert info.value.field == "limits.decision_rule"
    with pytest.raises(InputError, match="must be a table"):
        LimitMask.from_dict([1, 2])  # type: ignore[arg-type]
    with pytest.raises(InputError, match="LimitMask"):
        judge([], None, {"bands": []})  # type: ignore[arg-type]
    band = LimitBand(start_hz=1e9, stop_hz=2e9, nf_max_db=2.0)
    assert band.contains(1e9) and band.contains(2e9) and not band.contains(2.000001e9)
