"""Summary-data evidence for genetic-variant instruments: reading, harmonising, estimators and diagnostics.

Reference checks name their source beside the assertion: statsmodels WLS and meta-analysis (general-purpose
reference library), brute-force implementations of the published definitions written here, and exact
identities (Bowden, Davey Smith and Burgess 2015; Bowden et al. 2016; Hemani, Tilling and Davey Smith 2017).
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy import stats
from statsmodels.stats.meta_analysis import combine_effects

from ivdossier.errors import InvalidInputError
from ivdossier.estimation.variant_summary import (
    EggerFit,
    Heterogeneity,
    IvwFit,
    LeaveOneOut,
    NotApplicable,
    WeightedMedian,
    cochran_q,
    directionality,
    egger,
    ivw,
    leave_one_out,
    read_variant_table,
    summary_evidence,
    variant_table,
    wald_ratios,
    weighted_median,
    weighted_median_point,
)


def _frame(j: int = 12, seed: int = 7, pleiotropy: float = 0.0) -> pd.DataFrame:
    """An invented per-variant table: j variants, some with negative exposure effects."""
    rng = np.random.default_rng(seed)
    bx = rng.uniform(0.05, 0.3, j) * rng.choice([-1.0, 1.0], j)
    sx = rng.uniform(0.01, 0.02, j)
    sy = rng.uniform(0.01, 0.03, j)
    by = 0.4 * bx + pleiotropy * rng.uniform(0, 0.05, j) + rng.normal(0, sy)
    return pd.DataFrame(
        {
            "variant": [f"v{i:02d}" for i in range(j)],
            "exposure_effect": bx,
            "exposure_se": sx,
            "outcome_effect": by,
            "outcome_se": sy,
            "exposure_n": 40_000,
            "outcome_n": 60_000,
        }
    )


@pytest.fixture
def table():  # type: ignore[no-untyped-def]
    return variant_table(_frame(pleiotropy=1.0))


# ------------------------------------------------------------------------------------------------------
# estimators against reference computations
# ------------------------------------------------------------------------------------------------------


def test_ivw_is_the_weighted_regression_through_the_origin(table) -> None:  # type: ignore[no-untyped-def]
    fit = ivw(table)
    assert isinstance(fit, IvwFit)
    ref = sm.WLS(table.by, table.bx[:, None], weights=1 / table.sy**2).fit()
    assert fit.estimate == pytest.approx(ref.params[0], rel=1e-12)  # statsmodels WLS, no intercept
    # fixed-effect se = 1 / sqrt(sum bx^2 / sy^2): the WLS se with the residual scale set to 1
    assert fit.se_fixed == pytest.approx(ref.bse[0] / math.sqrt(ref.scale), rel=1e-12)  # statsmodels WLS
    assert fit.se_fixed == pytest.approx(
        1 / math.sqrt(np.sum(table.bx**2 / table.sy**2)), rel=1e-12
    )  # formula
    # multiplicative random effects: WLS se with the residual scale floored at 1 (common practice)
    assert fit.se_random == pytest.approx(ref.bse[0] * max(1, math.sqrt(ref.scale)) / math.sqrt(ref.scale))


def test_ivw_is_the_fixed_effect_meta_analysis_of_the_wald_ratios(table) -> None:  # type: ignore[no-untyped-def]
    ratios = wald_ratios(table)
    meta = combine_effects(np.array(ratios.ratio), np.array(ratios.se_first_order) ** 2)
    fit = ivw(table)
    assert isinstance(fit, IvwFit)
    assert fit.estimate == pytest.approx(meta.mean_effect_fe, rel=1e-12)  # statsmodels combine_effects
    assert fit.se_fixed == pytest.approx(meta.sd_eff_w_fe, rel=1e-12)  # statsmodels combine_effects


def test_cochran_q_against_its_formula_and_the_meta_analysis_q(table) -> None:  # type: ignore[no-untyped-def]
    het = cochran_q(table)
    assert isinstance(het, Heterogeneity)
    ratio = table.by / table.bx
    w = table.bx**2 / table.sy**2
    ivw_hat = np.sum(w * ratio) / np.sum(w)
    assert het.q == pytest.approx(np.sum(w * (ratio - ivw_hat) ** 2), rel=1e-12)  # Q = sum w (ratio - IVW)^2
    meta = combine_effects(ratio, 1 / w)
    assert het.q == pytest.approx(meta.q, rel=1e-12)  # statsmodels combine_effects
    assert het.q_p == pytest.approx(stats.chi2.sf(meta.q, table.n_variants - 1))  # chi2 with J - 1 df


def test_egger_is_the_oriented_weighted_regression_with_intercept(table) -> None:  # type: ignore[no-untyped-def]
    fit = egger(table)
    assert isinstance(fit, EggerFit)
    sign = np.sign(table.bx)
    bx, by = table.bx * sign, table.by * sign  # orientation to positive exposure effects (Bowden et al. 2015)
    ref = sm.WLS(by, sm.add_constant(bx), weights=1 / table.sy**2).fit()
    assert fit.intercept == pytest.approx(ref.params[0], rel=1e-10)  # statsmodels WLS
    assert fit.estimate == pytest.approx(ref.params[1], rel=1e-10)  # statsmodels WLS
    inflate = max(1.0, math.sqrt(ref.scale)) / math.sqrt(ref.scale)  # residual se floored at 1
    assert fit.se == pytest.approx(ref.bse[1] * inflate, rel=1e-10)  # statsmodels WLS
    assert fit.intercept_se == pytest.approx(ref.bse[0] * inflate, rel=1e-10)  # statsmodels WLS
    t0 = ref.params[0] / (ref.bse[0] * inflate)
    assert fit.intercept_p == pytest.approx(2 * stats.t.sf(abs(t0), table.n_variants - 2))  # t, J - 2 df
    assert fit.n_reoriented == int(np.sum(table.bx < 0))
    het = cochran_q(table)
    assert isinstance(het, Heterogeneity)
    assert het.q_prime == pytest.approx(ref.ssr, rel=1e-10)  # Rücker's Q' = weighted RSS (statsmodels)


def test_i2_gx_is_the_meta_analysis_i2_of_the_scaled_exposure_effects(table) -> None:  # type: ignore[no-untyped-def]
    fit = egger(table)
    assert isinstance(fit, EggerFit)
    # Bowden et al. 2016 (IJE): I² of bx_j / sy_j with standard errors sx_j / sy_j, bx oriented positive
    meta = combine_effects(np.abs(table.bx) / table.sy, (table.sx / table.sy) ** 2)
    assert fit.i2_gx == pytest.approx(max(0.0, meta.i2), rel=1e-10)  # statsmodels combine_effects


def _brute_weighted_median(ratio: np.ndarray, weight: np.ndarray) -> float:
    """Bowden et al. 2016 (Genet Epidemiol), written out step by step: order, standardise the weights, form
    s_j = w_1 + ... + w_j - w_j / 2 and interpolate between the two ratios whose s_j straddle one half."""
    pairs = sorted(zip(ratio.tolist(), weight.tolist(), strict=True))
    total = sum(w for _, w in pairs)
    s = []
    running = 0.0
    for _, w in pairs:
        running += w / total
        s.append(running - w / total / 2)
    for j in range(len(pairs) - 1):
        if s[j] < 0.5 <= s[j + 1]:
            b_j, b_next = pairs[j][0], pairs[j + 1][0]
            return b_j + (b_next - b_j) * (0.5 - s[j]) / (s[j + 1] - s[j])
    return pairs[0][0] if s[0] >= 0.5 else pairs[-1][0]


@pytest.mark.parametrize("seed", [1, 2, 3, 4, 5])
def test_weighted_median_matches_the_published_definition(seed: int) -> None:
    rng = np.random.default_rng(seed)
    ratio = rng.normal(0, 1, 9)
    weight = rng.uniform(0.1, 3, 9)
    assert weighted_median_point(ratio, weight) == pytest.approx(
        _brute_weighted_median(ratio, weight)
    )  # brute
    t = variant_table(_frame(seed=seed))
    wm = weighted_median(t, draws=20)
    assert isinstance(wm, WeightedMedian)
    assert wm.estimate == pytest.approx(
        _brute_weighted_median(t.by / t.bx, (t.bx / t.sy) ** 2)
    )  # brute force


def test_weighted_median_with_equal_weights_is_the_median() -> None:
    ratio = np.array([3.0, -1.0, 7.0, 0.5, 2.0])
    # odd count: s of the middle value is 1/2 (up to the rounding of the cumulative sum)
    assert weighted_median_point(ratio, np.ones(5)) == pytest.approx(2.0, rel=1e-12)


def test_weighted_median_bootstrap_se_scales_with_the_outcome_ses() -> None:
    """Equivariance: with exact ratios and negligible exposure noise, multiplying sy by c multiplies every
    bootstrap deviation (same seed) and hence the se by c (exact identity of the parametric bootstrap)."""
    f = _frame(j=9, seed=3)
    f["outcome_effect"] = 0.4 * f["exposure_effect"]
    f["exposure_se"] = 1e-12
    base = weighted_median(variant_table(f), draws=200, seed=11)
    f["outcome_se"] = 3 * f["outcome_se"]
    scaled = weighted_median(variant_table(f), draws=200, seed=11)
    assert isinstance(base, WeightedMedian) and isinstance(scaled, WeightedMedian)
    assert base.estimate == pytest.approx(0.4) and scaled.estimate == pytest.approx(0.4)
    assert scaled.se == pytest.approx(3 * base.se, rel=1e-6)  # exact identity, not a tolerance on noise
    assert base.se > 0


def test_leave_one_out_refits_without_each_variant(table) -> None:  # type: ignore[no-untyped-def]
    loo = leave_one_out(table)
    assert isinstance(loo, LeaveOneOut)
    for i, name in enumerate(table.variants):
        keep = np.arange(table.n_variants) != i
        ref = sm.WLS(table.by[keep], table.bx[keep][:, None], weights=1 / table.sy[keep] ** 2).fit()
        assert loo.variants[i] == name
        assert loo.estimate[i] == pytest.approx(ref.params[0], rel=1e-12)  # statsmodels WLS refit


def test_steiger_r2_from_t_is_the_squared_correlation_of_a_simple_regression() -> None:
    rng = np.random.default_rng(5)
    n = 2_000
    rows = []
    for j in range(4):
        g = rng.binomial(2, 0.3, n).astype(float)
        x = 0.2 * g + rng.normal(size=n)
        y = 0.02 * g + rng.normal(size=n)
        fx = sm.OLS(x, sm.add_constant(g)).fit()
        fy = sm.OLS(y, sm.add_constant(g)).fit()
        rows.append(
            {
                "variant": f"g{j}",
                "exposure_effect": fx.params[1],
                "exposure_se": fx.bse[1],
                "outcome_effect": fy.params[1],
                "outcome_se": fy.bse[1],
                "exposure_n": n,
                "outcome_n": n,
                "rx": np.corrcoef(g, x)[0, 1] ** 2,
                "ry": np.corrcoef(g, y)[0, 1] ** 2,
            }
        )
    frame = pd.DataFrame(rows)
    result = directionality(variant_table(frame))
    assert not isinstance(result, NotApplicable)
    # t^2 / (t^2 + n - 2) is the squared Pearson correlation for a one-regressor OLS (exact identity)
    assert result.r2_exposure == pytest.approx(frame["rx"].sum(), rel=1e-10)
    assert result.r2_outcome == pytest.approx(frame["ry"].sum(), rel=1e-10)
    z = (math.atanh(math.sqrt(frame["rx"].sum())) - math.atanh(math.sqrt(frame["ry"].sum()))) / math.sqrt(
        2 / (n - 3)
    )
    assert result.z == pytest.approx(z, rel=1e-8)  # Fisher z for two independent samples (Steiger 1980)
    assert result.direction == "exposure to outcome"
    swapped = frame.rename(
        columns={
            "exposure_effect": "outcome_effect",
            "outcome_effect": "exposure_effect",
            "exposure_se": "outcome_se",
            "outcome_se": "exposure_se",
        }
    )
    reverse = directionality(variant_table(swapped))
    assert not isinstance(reverse, NotApplicable)
    assert reverse.z == pytest.approx(-result.z) and reverse.direction.startswith("outcome to exposure")


def test_mean_f_is_the_mean_of_squared_exposure_t_values(table) -> None:  # type: ignore[no-untyped-def]
    ratios = wald_ratios(table)
    assert ratios.mean_f == pytest.approx(np.mean((table.bx / table.sx) ** 2))  # definition, common practice
    # second-order se (delta method): sqrt(sy^2/bx^2 + by^2 sx^2/bx^4)
    j = 3
    assert ratios.se_second_order[j] == pytest.approx(
        math.sqrt(
            table.sy[j] ** 2 / table.bx[j] ** 2 + table.by[j] ** 2 * table.sx[j] ** 2 / table.bx[j] ** 4
        )
    )


# ------------------------------------------------------------------------------------------------------
# reading and harmonising
# ------------------------------------------------------------------------------------------------------


def _with_alleles() -> pd.DataFrame:
    f = _frame(j=5)
    f["exposure_effect_allele"] = ["A", "C", "G", "A", "A"]
    f["exposure_other_allele"] = ["G", "T", "A", "T", "C"]
    f["outcome_effect_allele"] = ["A", "T", "C", "A", "g"]  # same, swapped, strand, palindromic, swapped
    f["outcome_other_allele"] = ["G", "C", "T", "T", "t"]
    return f


def test_swapped_alleles_flip_the_outcome_sign_and_are_counted() -> None:
    f = _with_alleles()
    t = variant_table(f)
    h = t.harmonisation
    assert h.flipped == ("v01", "v04") and h.n_flipped == 2
    assert h.strand_complemented == ("v02", "v04")
    assert h.palindromic == ("v03",)
    assert t.by[1] == -f["outcome_effect"][1] and t.by[4] == -f["outcome_effect"][4]
    assert t.by[0] == f["outcome_effect"][0] and t.by[2] == f["outcome_effect"][2]
    assert "sign flipped for 2" in str(h)


def test_mismatched_alleles_name_the_variant() -> None:
    f = _with_alleles()
    f.loc[2, "outcome_effect_allele"] = "T"
    with pytest.raises(InvalidInputError, match=r"do not match .*v02 \(exposure G/A, outcome T/T\)"):
        variant_table(f)


def test_values_that_are_not_alleles_are_refused() -> None:
    f = _with_alleles()
    f.loc[1, "exposure_other_allele"] = "2"
    with pytest.raises(
        InvalidInputError, match=r"'exposure_other_allele' holds values that are not alleles for 'v01 \(2\)'"
    ):
        variant_table(f)


def test_column_names_that_collide_when_case_is_ignored_are_refused() -> None:
    f = _frame().assign(Variant="x")
    with pytest.raises(InvalidInputError, match=r"Column name\(s\) 'variant' occur more than once"):
        variant_table(f)


def test_incomplete_allele_columns_are_refused() -> None:
    f = _with_alleles().drop(columns=["outcome_other_allele"])
    with pytest.raises(InvalidInputError, match="'outcome_other_allele' missing; give all four"):
        variant_table(f)


def test_missing_columns_are_listed_with_the_fix() -> None:
    f = _frame().drop(columns=["outcome_se"])
    with pytest.raises(InvalidInputError, match=r"lacks column\(s\) 'outcome_se'.*columns=\{our_name"):
        variant_table(f)


def test_column_mapping_renames_their_columns_to_ours() -> None:
    f = _frame().rename(columns={"variant": "SNP", "outcome_se": "se.out"})
    t = variant_table(f, columns={"variant": "SNP", "outcome_se": "se.out"})
    assert t.variants[0] == "v00"


def test_zero_standard_errors_name_the_variants() -> None:
    f = _frame()
    f.loc[[2, 5], "exposure_se"] = 0.0
    with pytest.raises(InvalidInputError, match=r"'exposure_se' holds zero or negative .* 'v02', 'v05'"):
        variant_table(f)


def test_duplicate_variants_are_refused() -> None:
    f = _frame()
    f.loc[4, "variant"] = "v01"
    with pytest.raises(InvalidInputError, match=r"Variant\(s\) 'v01' appear more than once"):
        variant_table(f)


def test_non_numeric_effects_name_the_value() -> None:
    f = _frame()
    f["outcome_effect"] = f["outcome_effect"].astype(object)
    f.loc[3, "outcome_effect"] = "n/a"
    with pytest.raises(
        InvalidInputError,
        match=r"'outcome_effect' has missing, infinite or non-numeric values \(e.g. 'n/a'\)",
    ):
        variant_table(f)


def test_csv_and_tsv_read_the_same_table(tmp_path: Path) -> None:
    f = _with_alleles()
    f.to_csv(tmp_path / "variants.csv", index=False)
    f.to_csv(tmp_path / "variants.tsv", index=False, sep="\t")
    a = read_variant_table(tmp_path / "variants.csv")
    b = read_variant_table(tmp_path / "variants.tsv")
    assert a.variants == b.variants and np.allclose(a.by, b.by) and a.harmonisation == b.harmonisation
    assert a.source == "variants.csv"
    with pytest.raises(InvalidInputError, match=r"unknown extension '\.xlsx'"):
        read_variant_table(tmp_path / "variants.xlsx")
    with pytest.raises(InvalidInputError, match="no such file"):
        read_variant_table(tmp_path / "absent.csv")


# ------------------------------------------------------------------------------------------------------
# not applicable, printing, JSON
# ------------------------------------------------------------------------------------------------------


def test_too_few_variants_give_reasons_not_errors() -> None:
    t = variant_table(_frame(j=2))
    assert isinstance(egger(t), NotApplicable) and "at least three variants" in egger(t).reason  # type: ignore[union-attr]
    assert isinstance(weighted_median(t), NotApplicable)
    assert isinstance(leave_one_out(t), NotApplicable)
    assert isinstance(ivw(variant_table(_frame(j=1))), NotApplicable)
    assert isinstance(directionality(variant_table(_frame().drop(columns=["outcome_n"]))), NotApplicable)


def test_evidence_prints_the_caution_and_round_trips_to_json(table) -> None:  # type: ignore[no-untyped-def]
    ev = summary_evidence(table, draws=50)
    text = str(ev)
    assert "cannot establish exclusion or exogeneity" in text and "need domain review" in text
    assert "IVW" in text and "MR-Egger" in text and "Weighted median" in text and "Cochran's Q" in text
    data = json.loads(json.dumps(ev.to_dict()))
    assert data["kind"] == "summary_data_evidence"
    assert data["ivw"]["estimate"] == pytest.approx(ev.ivw.estimate)  # type: ignore[union-attr]
    assert len(data["table"]["rows"]) == table.n_variants


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(
    raw=st.text(
        alphabet=st.sampled_from(list("variant,exposure_effect_se\toutcome0.1-e\r\n\"';x")), max_size=200
    )
)
def test_any_file_content_gives_a_table_or_one_clear_error(tmp_path: Path, raw: str) -> None:
    """Hostile input: arbitrary text in a .csv or .txt file is read or refused with InvalidInputError only."""
    for name in ("hostile.csv", "hostile.txt"):
        path = tmp_path / name
        path.write_text(raw, encoding="utf-8")
        try:
            read_variant_table(path)
        except InvalidInputError as exc:
            assert str(exc)  # one message naming the problem
