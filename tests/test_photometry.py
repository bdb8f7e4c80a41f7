"""Behaviour of selector.photometry beyond the published boundaries (see tests/external)."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from selector.core import photometry as ph

pytestmark = pytest.mark.filterwarnings("error")  # NaN and overflow must stay silent


# inside every criterion: x = log10(f4.6/f3.4) = 0.344, y = log10(f12/f4.6) = 0.186
RED = {"3.4": np.array([15.0]), "4.6": np.array([13.5]), "12": np.array([11.2])}


# ---- registry ----------------------------------------------------------------------


def test_registry_names():
    names = ph.criterion_names()
    assert names == list(ph.CRITERIA)
    assert set(names) == {
        "stern2012", "assef2013_r90", "assef2018_r90", "assef2018_r75", "assef2018_c75", "mateos2012_wedge",
    }
    assert all(ph.CRITERIA[n].name == n and set(ph.CRITERIA[n].bands) <= set(ph.BANDS) for n in names)
    names.append("mutated")
    assert "mutated" not in ph.criterion_names()


# ---- NaN and missing bands --------------------------------------------------------------


@pytest.mark.parametrize("name", ph.criterion_names())
def test_nan_in_any_required_band_fails_with_nan_excess(name):
    needed = ph.CRITERIA[name].bands
    for band in needed:
        mags = {b: np.array([RED[b][0], RED[b][0]]) for b in needed}
        mags[band] = np.array([np.nan, RED[band][0]])
        r = ph.CRITERIA[name].select(mags)
        assert r.passed.dtype == bool and r.excess_mag.dtype == np.float64
        assert not r.passed[0] and np.isnan(r.excess_mag[0])
        assert r.passed[1] and r.excess_mag[1] > 0


@pytest.mark.parametrize("name", ph.criterion_names())
def test_absent_band_key_is_treated_as_unmeasured(name):
    mags = {"4.6": np.array([13.0, 14.0, 15.0])}
    r = ph.CRITERIA[name].select(mags)
    assert r.passed.shape == (3,) and not r.passed.any()
    assert np.isnan(r.excess_mag).all()


def test_wedge_needs_the_12_micron_band():
    two_band = {"3.4": RED["3.4"], "4.6": RED["4.6"]}
    assert not ph.mateos2012_wedge(two_band).passed.any()
    assert ph.mateos2012_wedge(RED).passed.all()


def test_empty_mapping_is_an_error():
    with pytest.raises(ValueError, match="empty"):
        ph.stern2012({})


def test_non_mapping_is_a_type_error():
    with pytest.raises(TypeError, match="mapping"):
        ph.stern2012([1.0, 2.0])


def test_scalars_and_broadcasting():
    r = ph.stern2012({"3.4": 15.0, "4.6": 14.0})
    assert r.passed.shape == () and bool(r.passed)
    assert float(r.excess_mag) == pytest.approx(0.2)
    r = ph.assef2018_c75({"3.4": np.array([14.0, 15.0, 16.0]), "4.6": 14.0})
    assert r.passed.tolist() == [False, True, True]


def test_inputs_are_not_modified():
    m1 = np.array([15.0, np.nan])
    m2 = np.array([14.0, 13.0])
    m3 = np.array([11.0, 11.0])
    mags = {"3.4": m1, "4.6": m2, "12": m3}
    before = {k: v.copy() for k, v in mags.items()}
    ph.apply_criteria(mags, ph.criterion_names())
    for k in mags:
        np.testing.assert_array_equal(mags[k], before[k])


def test_overflow_far_past_the_faint_end_is_silent():
    r = ph.assef2018_r75({"3.4": np.array([400.0]), "4.6": np.array([399.0])})
    assert not r.passed[0] and r.excess_mag[0] == -np.inf


# ---- combining criteria -----------------------------------------------------------------


def _combo_sources():
    # 0: colour between the C75 (0.71) and Stern (0.8) thresholds; 1: red and bright;
    # 2: blue; 3: red but fainter than the Stern limit; 4: 3.4 µm missing
    m2 = np.array([14.0, 14.0, 14.0, 15.5, 14.0])
    colour = np.array([0.75, 1.0, 0.5, 1.0, np.nan])
    return {"3.4": m2 + colour, "4.6": m2}


def test_combine_any_and_all():
    mags = _combo_sources()
    stern = ph.stern2012(mags)
    c75 = ph.assef2018_c75(mags)
    # source 3 is too faint for Stern but red enough for C75
    assert stern.passed.tolist() == [False, True, False, False, False]
    assert c75.passed.tolist() == [True, True, False, True, False]

    union = ph.apply_criteria(mags, ["stern2012", "assef2018_c75"], combine="any")
    assert union.passed.tolist() == [True, True, False, True, False]
    np.testing.assert_array_equal(union.excess_mag[:4], np.maximum(stern.excess_mag, c75.excess_mag)[:4])
    assert np.isnan(union.excess_mag[4])

    both = ph.apply_criteria(mags, ["stern2012", "assef2018_c75"], combine="all")
    assert both.passed.tolist() == [False, True, False, False, False]
    np.testing.assert_array_equal(both.excess_mag[:4], np.minimum(stern.excess_mag, c75.excess_mag)[:4])
    assert np.isnan(both.excess_mag[4])


def test_combine_any_ignores_criteria_that_cannot_be_evaluated():
    mags = {"3.4": np.array([15.0]), "4.6": np.array([14.0]), "12": np.array([np.nan])}
    union = ph.apply_criteria(mags, ["mateos2012_wedge", "stern2012"], "any")
    assert union.passed[0] and union.excess_mag[0] == pytest.approx(0.2)
    both = ph.apply_criteria(mags, ["mateos2012_wedge", "stern2012"], "all")
    assert not both.passed[0] and np.isnan(both.excess_mag[0])


def test_single_name_string_and_default_combine():
    mags = _combo_sources()
    a = ph.apply_criteria(mags, "stern2012")
    b = ph.stern2012(mags)
    np.testing.assert_array_equal(a.passed, b.passed)
    np.testing.assert_array_equal(a.excess_mag, b.excess_mag)


def test_combine_must_be_any_or_all():
    with pytest.raises(ValueError, match=r"'any' or 'all'.*'union'"):
        ph.apply_criteria(RED, ["stern2012"], combine="union")


def test_empty_name_list_is_an_error():
    with pytest.raises(ValueError, match="at least one"):
        ph.apply_criteria(RED, [])


@pytest.mark.parametrize(
    "typo,suggestion",
    [("stern2021", "stern2012"), ("Stern2012", "stern2012"), ("assef2018_r09", "assef2018_r90"),
     ("mateos_wedge", "mateos2012_wedge")],
)
def test_unknown_name_lists_valid_names_and_suggests(typo, suggestion):
    with pytest.raises(ValueError) as info:
        ph.apply_criteria(RED, ["stern2012", typo])
    message = str(info.value)
    assert repr(typo) in message
    for name in ph.criterion_names():
        assert name in message
    assert f"did you mean {suggestion!r}" in message


def test_unknown_name_without_close_match_has_no_suggestion():
    with pytest.raises(ValueError) as info:
        ph.apply_criteria(RED, ["zzzz"])
    assert "did you mean" not in str(info.value)


# ---- linear cuts ----------------------------------------------------------------------


def test_linear_cut_colour_versus_magnitude_above():
    q = {"3.4": np.array([15.0, 14.5, 14.0, np.nan]), "4.6": np.array([14.0, 14.0, 14.0, 14.0])}
    # keep (3.4 - 4.6) >= 0.25 * 4.6 - 3, i.e. colour >= 0.5 at 4.6 = 14 (exact in binary)
    cut = ph.LinearCut("red", ("3.4", "4.6"), ("4.6",), 0.25, -3.0, "above")
    r = ph.apply_linear_cut(q, cut)
    assert r.passed.tolist() == [True, True, False, False]
    np.testing.assert_allclose(r.excess_mag[:3], [0.5, 0.0, -0.5], atol=1e-12)
    assert np.isnan(r.excess_mag[3])


def test_linear_cut_below_flips_the_sign():
    q = {"3.4": np.array([15.0, 14.0]), "4.6": np.array([14.0, 14.0])}
    above = ph.apply_linear_cut(q, ph.LinearCut("a", ("3.4", "4.6"), ("4.6",), 0.0, 0.5, "above"))
    below = ph.apply_linear_cut(q, ph.LinearCut("b", ("3.4", "4.6"), ("4.6",), 0.0, 0.5, "below"))
    assert above.passed.tolist() == [True, False]
    assert below.passed.tolist() == [False, True]
    np.testing.assert_allclose(below.excess_mag, -above.excess_mag)


def test_linear_cut_line_itself_is_kept_on_either_side():
    q = {"4.6": np.array([14.0]), "3.4": np.array([15.0])}
    for side in ("above", "below"):
        r = ph.apply_linear_cut(q, ph.LinearCut("on", ("4.6",), ("3.4",), 1.0, -1.0, side))
        assert r.passed[0] and r.excess_mag[0] == 0.0


def test_linear_cut_colour_on_both_axes_with_optical_quantity():
    q = {
        "opt_broad": np.array([18.0, 16.0, 17.0]),
        "3.4": np.array([15.0, 15.0, np.nan]),
        "4.6": np.array([14.0, 14.6, 14.0]),
    }
    # y = opt_broad - 3.4, x = 3.4 - 4.6; keep y <= 2x + 1
    cut = ph.LinearCut("opt", ("opt_broad", "3.4"), ("3.4", "4.6"), 2.0, 1.0, "below")
    r = ph.apply_linear_cut(q, cut)
    # source 0: y = 3, line = 3 -> kept, excess 0; source 1: y = 1, x = 0.4, line = 1.8 -> kept
    np.testing.assert_allclose(r.excess_mag[:2], [0.0, 0.8], atol=1e-12)
    assert r.passed.tolist() == [True, True, False]
    assert np.isnan(r.excess_mag[2])


def test_linear_cut_magnitude_versus_magnitude():
    q = {"opt_broad": np.array([19.0, 17.0]), "4.6": np.array([14.0, 14.0])}
    r = ph.apply_linear_cut(q, ph.LinearCut("mm", ("opt_broad",), ("4.6",), 1.0, 4.0, "above"))
    assert r.passed.tolist() == [True, False]
    np.testing.assert_allclose(r.excess_mag, [1.0, -1.0])


def test_linear_cut_from_mapping_accepts_lists_and_normalises():
    cut = ph.LinearCut.from_mapping(
        {"name": "c", "y": ["3.4", "4.6"], "x": "4.6", "slope": 0, "intercept": 1, "side": "Above"}
    )
    assert cut == ph.LinearCut("c", ("3.4", "4.6"), ("4.6",), 0.0, 1.0, "above")
    assert isinstance(cut.slope, float)


def test_linear_cut_from_mapping_reports_missing_and_unknown_fields():
    with pytest.raises(ValueError, match=r"'c'.*missing side.*unknown colour"):
        ph.LinearCut.from_mapping(
            {"name": "c", "y": ["3.4"], "x": ["4.6"], "slope": 0, "intercept": 1, "colour": 2}
        )


@pytest.mark.parametrize(
    "field,value,pattern",
    [
        ("side", "left", r"side must be 'above' or 'below'.*'left'"),
        ("y", (), r"y must be one quantity name"),
        ("x", ("3.4", "4.6", "12"), r"x must be one quantity name"),
        ("x", (3,), r"x must be one quantity name"),
        ("slope", float("nan"), r"slope must be a finite number"),
        ("intercept", "1.0", r"intercept must be a finite number"),
        ("name", "", r"name must be a non-empty string"),
    ],
)
def test_linear_cut_validation(field, value, pattern):
    cut = ph.LinearCut("bad", ("3.4", "4.6"), ("4.6",), 0.0, 0.5, "above")._replace(**{field: value})
    with pytest.raises(ValueError, match=pattern):
        ph.apply_linear_cut(RED, cut)


def test_linear_cut_unknown_quantity_names_the_cut_and_the_choices():
    cut = ph.LinearCut("typo", ("3.4", "opt_brod"), ("4.6",), 0.0, 0.5, "above")
    with pytest.raises(ValueError, match=r"'typo'.*'opt_brod'.*available: 12, 3\.4, 4\.6"):
        ph.apply_linear_cut(RED, cut)


# ---- systems and helpers -----------------------------------------------------------------


@pytest.mark.parametrize("system", ["vega", "Vega", "VEGA", " vega "])
def test_to_vega_identity_returns_a_copy(system):
    m = np.array([12.0, np.nan])
    out = ph.to_vega(m, "3.4", system)
    np.testing.assert_array_equal(out, m)
    out[0] = 0.0
    assert m[0] == 12.0


@pytest.mark.parametrize("system", ["ab", "AB", "Ab"])
def test_to_vega_from_ab(system):
    assert float(ph.to_vega(20.0, "4.6", system)) == pytest.approx(20.0 - 3.339)


@pytest.mark.parametrize("system", ["st", "", None, 3])
def test_to_vega_unknown_system_names_allowed_values(system):
    with pytest.raises(ValueError, match=r"magnitude system.*'vega', 'ab'"):
        ph.to_vega(12.0, "3.4", system)


@pytest.mark.parametrize("func", [ph.vega_to_ab, ph.ab_to_vega])
def test_unknown_band_lists_valid_bands(func):
    with pytest.raises(ValueError, match=r"'3p4'.*3\.4, 4\.6, 12, 22"):
        func(12.0, "3p4")  # the column-name form is not a band label
    with pytest.raises(ValueError, match="valid bands"):
        ph.to_vega(12.0, "K", "vega")


@pytest.mark.parametrize("text,label", [("3.4", "3.4"), ("3.4", "3.4"), (" 4.6 ", "4.6"), ("12.0", "12"), ("22", "22")])
def test_band_label(text, label):
    assert ph.band_label(text) == label


def test_band_label_rejects_other_wavelengths():
    with pytest.raises(ValueError, match="valid bands"):
        ph.band_label("2.2")


def test_colour_helper():
    mags = {"a": np.array([15.0, np.nan]), "b": np.array([14.0, 1.0])}
    c = ph.colour(mags, "a", "b")
    assert c[0] == 1.0 and np.isnan(c[1])
    with pytest.raises(ValueError, match=r"'c'.*available: a, b"):
        ph.colour(mags, "a", "c")


def test_flux_ratio_sign_convention():
    # brighter (smaller magnitude) in band b means f_b / f_a > 1
    assert float(ph.flux_ratio_log10(14.0, 14.0 - 2.5 - (3.339 - 2.699), "3.4", "4.6")) == pytest.approx(1.0)


# ---- properties ----------------------------------------------------------------------------

finite_mag = st.floats(min_value=5.0, max_value=25.0, allow_nan=False)
maybe_mag = st.one_of(finite_mag, st.just(float("nan")))


@settings(max_examples=150, deadline=None)
@given(m1=maybe_mag, m2=maybe_mag, m3=maybe_mag, name=st.sampled_from(ph.criterion_names()))
def test_excess_sign_agrees_with_passed(m1, m2, m3, name):
    r = ph.CRITERIA[name].select({"3.4": np.array([m1]), "4.6": np.array([m2]), "12": np.array([m3])})
    e = r.excess_mag[0]
    if np.isnan(e):
        assert not r.passed[0]
    elif e > 0:
        assert r.passed[0]
    elif e < 0:
        assert not r.passed[0]


@settings(max_examples=100, deadline=None)
@given(m=finite_mag, band=st.sampled_from(ph.BANDS))
def test_round_trip_property(m, band):
    assert float(ph.ab_to_vega(ph.vega_to_ab(m, band), band)) == pytest.approx(m, abs=1e-12)


@settings(max_examples=60, deadline=None)
@given(
    data=st.lists(st.tuples(maybe_mag, maybe_mag, maybe_mag), min_size=1, max_size=8),
    names=st.lists(st.sampled_from(ph.criterion_names()), min_size=1, max_size=4, unique=True),
)
def test_any_is_union_and_all_is_intersection(data, names):
    arr = np.array(data, dtype=float)
    mags = {"3.4": arr[:, 0], "4.6": arr[:, 1], "12": arr[:, 2]}
    singles = np.stack([ph.CRITERIA[n].select(mags).passed for n in names])
    np.testing.assert_array_equal(ph.apply_criteria(mags, names, "any").passed, singles.any(axis=0))
    np.testing.assert_array_equal(ph.apply_criteria(mags, names, "all").passed, singles.all(axis=0))
