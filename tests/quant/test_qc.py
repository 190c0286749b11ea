"""ROI statistics and QC figures (quant.qc): hand-computed values, numpy references, and the
Rayleigh-background SNR estimator on synthetic Rician data of known SNR."""

import numpy as np
import pytest

from quant.qc import (
    RAYLEIGH_SD_FACTOR,
    QcFigures,
    QcThresholds,
    asymmetry_index,
    b0_range,
    candidate_region,
    hemisphere_stats,
    left_axis_from_orientation,
    qc_gates,
    region_stats,
    snr_from_m0,
    valid_fraction,
)


def test_region_stats_matches_numpy_sample_sd():
    rng = np.random.default_rng(31)
    v = rng.normal(2.0, 0.5, (4, 9, 11))
    v[0, 0, :3] = np.nan
    mask = rng.random(v.shape) > 0.3
    st = region_stats(v, mask)
    sel = v[mask & np.isfinite(v)]
    # numpy reference: mean and std with ddof=1 (the sample standard deviation)
    assert st.n == sel.size
    assert st.mean == pytest.approx(np.mean(sel), rel=1e-12)
    assert st.sd == pytest.approx(np.std(sel, ddof=1), rel=1e-12)


def test_region_stats_empty_and_single():
    v = np.array([1.0, 2.0])
    empty = region_stats(v, np.zeros(2, bool))
    assert empty.n == 0 and np.isnan(empty.mean) and np.isnan(empty.sd)
    one = region_stats(v, np.array([True, False]))
    assert one.n == 1 and one.mean == 1.0 and np.isnan(one.sd)


def test_hemisphere_stats_by_hand():
    # 1 x 6 row, columns 0..5, midline given at 2.5 (between columns 2 and 3):
    # columns 3, 4, 5 are patient left (index grows to the left): values 4, 6, 8 -> mean 6,
    # SD sqrt(((4-6)^2 + 0 + (8-6)^2) / 2) = 2; columns 0, 1, 2: 1, 2, 3 -> mean 2, SD 1
    v = np.array([[1.0, 2.0, 3.0, 4.0, 6.0, 8.0]])
    m = np.ones_like(v, dtype=bool)
    s = hemisphere_stats(v, m, midline_axis=1, left_is_increasing=True, midline_index=2.5)
    assert (s.left.mean, s.left.sd, s.left.n) == (6.0, 2.0, 3)
    assert (s.right.mean, s.right.sd, s.right.n) == (2.0, 1.0, 3)
    assert s.asymmetry_index == pytest.approx(2 * (6 - 2) / (6 + 2))  # = 1.0
    assert s.difference == 4.0
    # the other direction swaps the sides
    f = hemisphere_stats(v, m, midline_axis=1, left_is_increasing=False, midline_index=2.5)
    assert (f.left.mean, f.right.mean) == (2.0, 6.0)
    assert f.asymmetry_index == pytest.approx(-1.0)


def test_automatic_midline_is_mask_centroid_and_excludes_the_midline_column():
    # mask covers columns 1..5 -> centroid 3.0: column 3 straddles the midline, in neither side
    v = np.tile(np.arange(7, dtype=float), (2, 1))
    m = np.zeros_like(v, dtype=bool)
    m[:, 1:6] = True
    s = hemisphere_stats(v, m, midline_axis=-1, left_is_increasing=True)
    assert s.midline_index == 3.0
    assert s.left.n == 4 and s.left.mean == 4.5  # columns 4, 5
    assert s.right.n == 4 and s.right.mean == 1.5  # columns 1, 2


def test_hemisphere_stats_ignores_nan_and_3d_axis():
    rng = np.random.default_rng(32)
    v = rng.normal(size=(3, 8, 10))
    v[1, 2, 7] = np.nan
    m = np.ones(v.shape, dtype=bool)
    s = hemisphere_stats(v, m, midline_axis=2, left_is_increasing=True, midline_index=4.5)
    left = v[:, :, 5:]
    assert s.left.n == np.isfinite(left).sum() == 3 * 8 * 5 - 1
    assert s.left.mean == pytest.approx(np.nanmean(left))
    assert s.right.sd == pytest.approx(np.std(v[:, :, :5], ddof=1))


def test_asymmetry_index_formula_and_degenerate():
    assert asymmetry_index(1.5, 0.5) == pytest.approx(2 * 1.0 / 2.0)
    assert np.isnan(asymmetry_index(1.0, -1.0))
    assert np.isnan(asymmetry_index(np.nan, 1.0))


def test_left_axis_from_orientation():
    # DICOM LPS: +x is patient left (PS3.3 C.7.6.2.1.1)
    assert left_axis_from_orientation([1, 0, 0, 0, 1, 0]) == (-1, True)
    assert left_axis_from_orientation([-1, 0, 0, 0, 1, 0]) == (-1, False)
    assert left_axis_from_orientation([0, 1, 0, 1, 0, 0]) == (-2, True)  # transposed axial
    assert left_axis_from_orientation([1, 0, 0, 0, 0, -1]) == (-1, True)  # coronal
    with pytest.raises(ValueError, match="sagittal"):
        left_axis_from_orientation([0, 1, 0, 0, 0, -1])
    with pytest.raises(ValueError, match="6 finite"):
        left_axis_from_orientation([1, 0, 0])


def rician_image(snr, sigma, rng, shape=(4, 96, 96)):
    """Magnitude of (A + n1) + i n2 with n ~ N(0, sigma): a disc of amplitude A = snr sigma."""
    yy, xx = np.mgrid[: shape[1], : shape[2]]
    disc = (yy - shape[1] / 2) ** 2 + (xx - shape[2] / 2) ** 2 < (0.3 * shape[1]) ** 2
    mask = np.broadcast_to(disc, shape)
    amp = np.where(mask, snr * sigma, 0.0)
    re = amp + rng.normal(0, sigma, shape)
    im = rng.normal(0, sigma, shape)
    return np.hypot(re, im), mask.copy()


@pytest.mark.parametrize("estimator", ["sd", "mean"])
@pytest.mark.parametrize("snr", [20.0, 80.0])
def test_snr_on_rician_data_of_known_snr(snr, estimator):
    # stated tolerance: 3 % (about 25000 background voxels; the SD of an SD estimate is about
    # 1/sqrt(2N), 0.5 %; the Rician bias of the signal mean at SNR 20 is 1/(2 SNR^2) = 0.1 %)
    rng = np.random.default_rng(33)
    img, mask = rician_image(snr, 7.0, rng)
    est = snr_from_m0(img, mask, estimator=estimator)
    assert est.snr == pytest.approx(snr, rel=0.03)
    assert est.noise_sigma == pytest.approx(7.0, rel=0.03)
    assert est.n_background > 20000


def test_snr_without_the_rayleigh_factor_would_be_wrong():
    # the naive SD of the magnitude background underestimates sigma by 0.655 (Henkelman 1985)
    rng = np.random.default_rng(34)
    img, mask = rician_image(40.0, 3.0, rng)
    est = snr_from_m0(img, mask)
    bg = img[:, :5, :5]
    assert np.std(bg, ddof=1) / 3.0 == pytest.approx(RAYLEIGH_SD_FACTOR, rel=0.1)
    assert est.snr == pytest.approx(40.0, rel=0.03)


def test_snr_zeroed_background_is_nan():
    img = np.zeros((40, 40))
    mask = np.zeros_like(img, dtype=bool)
    mask[10:30, 10:30] = True
    img[mask] = 100.0
    est = snr_from_m0(img, mask)
    assert np.isnan(est.snr) and est.n_background == 0
    assert est.signal_mean == 100.0


def test_snr_explicit_background_and_errors():
    rng = np.random.default_rng(35)
    img, mask = rician_image(30.0, 2.0, rng, shape=(2, 80, 80))
    bg = np.zeros_like(mask)
    bg[:, :15, :] = True  # 2400 voxels: SD of the estimate about 1.5 %
    assert snr_from_m0(img, mask, background=bg).snr == pytest.approx(30.0, rel=0.06)
    with pytest.raises(ValueError, match="overlap"):
        snr_from_m0(img, mask, background=mask)
    with pytest.raises(ValueError, match="no voxels"):
        snr_from_m0(img, np.zeros_like(mask))
    with pytest.raises(ValueError, match="estimator"):
        snr_from_m0(img, mask, estimator="median")
    with pytest.raises(ValueError, match="boolean"):
        snr_from_m0(img, mask.astype(int))


def test_b0_range_is_numpy_percentiles():
    rng = np.random.default_rng(36)
    b = rng.normal(0.05, 0.1, (5, 20, 20))
    b[0, 0, 0] = np.nan
    m = rng.random(b.shape) > 0.5
    sel = b[m & np.isfinite(b)]
    assert b0_range(b, m) == pytest.approx(tuple(np.percentile(sel, [2, 98])))
    assert b0_range(b, m, percentiles=(0, 100)) == pytest.approx((sel.min(), sel.max()))
    assert all(np.isnan(b0_range(b, np.zeros_like(m))))
    with pytest.raises(ValueError, match="percentiles"):
        b0_range(b, m, percentiles=(50, 10))


def test_valid_fraction_by_hand():
    v = np.array([1.0, np.nan, 3.0, np.inf, 5.0])
    m = np.array([True, True, True, True, False])
    assert valid_fraction(v, m) == 0.5  # 2 finite of 4 in the mask
    with pytest.raises(ValueError, match="no voxels"):
        valid_fraction(v, np.zeros(5, bool))
    with pytest.raises(ValueError, match="mask shape"):
        valid_fraction(v, np.ones(4, bool))


def test_qc_gates_each_reason():
    ok = QcFigures(
        b0_low_ppm=-0.2,
        b0_high_ppm=0.3,
        sampled_low_ppm=-4.0,
        sampled_high_ppm=4.0,
        snr=60.0,
        max_motion_mm=0.5,
        valid_fraction=0.98,
    )
    assert qc_gates(ok) == []
    t = QcThresholds(measure_offset_ppm=3.5)
    assert qc_gates(ok, t) == []  # 3.5 + 0.3 = 3.8 <= 4.0
    wide = QcFigures(b0_low_ppm=-0.2, b0_high_ppm=0.7, sampled_low_ppm=-4.0, sampled_high_ppm=4.0)
    reasons = qc_gates(wide, t)  # 3.5 + 0.7 = 4.2 > 4.0
    assert [r.code for r in reasons] == ["b0_range"]
    assert "4.20 ppm" in reasons[0].message
    out = QcFigures(b0_low_ppm=-5.0, b0_high_ppm=0.1, sampled_low_ppm=-4.0, sampled_high_ppm=4.0)
    assert "beyond the sampled offsets" in qc_gates(out)[0].message
    strict = QcThresholds(max_abs_b0_ppm=0.25)
    assert [r.code for r in qc_gates(ok, strict)] == ["b0_range"]
    bad = QcFigures(snr=8.0, max_motion_mm=3.1, valid_fraction=0.5)
    assert [r.code for r in qc_gates(bad)] == ["snr", "motion", "valid_fraction"]
    assert "3.10 mm exceeds 2 mm" in qc_gates(bad)[1].message
    assert [r.code for r in qc_gates(QcFigures(snr=float("nan")))] == ["snr_unknown"]
    assert qc_gates(QcFigures()) == []  # nothing measured, nothing gated
    with pytest.raises(ValueError, match="min_snr"):
        QcThresholds(min_snr=-1.0)
    with pytest.raises(ValueError, match="min_valid_fraction"):
        QcThresholds(min_valid_fraction=1.5)
    with pytest.raises(ValueError, match="measure_offset_ppm"):
        QcThresholds(measure_offset_ppm=float("nan"))


def test_candidate_region_by_hand_and_min_voxels():
    # threshold 1.0 - 2 * 0.1 = 0.8: values strictly below it, inside the mask, finite
    v = np.array(
        [
            [1.0, 0.5, 0.5, 1.0, 0.7],
            [1.0, 0.5, 1.0, 1.0, 1.0],
            [0.79, 1.0, np.nan, 0.8, 0.1],
        ]
    )
    m = np.ones_like(v, dtype=bool)
    m[2, 4] = False
    r = candidate_region(v, m, contralateral_mean=1.0, contralateral_sd=0.1, n_sd=2.0)
    expect = np.array(
        [
            [False, True, True, False, True],
            [False, True, False, False, False],
            [True, False, False, False, False],
        ]
    )
    np.testing.assert_array_equal(r, expect)
    # components (face connectivity): {(0,1),(0,2),(1,1)} size 3, {(0,4)} 1, {(2,0)} 1
    big = candidate_region(
        v, m, contralateral_mean=1.0, contralateral_sd=0.1, n_sd=2.0, min_voxels=2
    )
    assert np.argwhere(big).tolist() == [[0, 1], [0, 2], [1, 1]]
    with pytest.raises(ValueError, match="contralateral_sd"):
        candidate_region(v, m, contralateral_mean=1.0, contralateral_sd=-0.1)
    with pytest.raises(ValueError, match="contralateral_mean must be finite"):
        candidate_region(v, m, contralateral_mean=np.nan, contralateral_sd=0.1)
    with pytest.raises(ValueError, match="min_voxels"):
        candidate_region(v, m, contralateral_mean=1.0, contralateral_sd=0.1, min_voxels=0)
