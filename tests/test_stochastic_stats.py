"""The statistics under the stochastic-gradient check, against reference libraries:
Student's t tail and quantiles and the regularized incomplete beta against scipy
(scipy.stats.t, scipy.special.betainc; DLMF 8.17), Holm's procedure against statsmodels'
multipletests(method="holm") (Holm 1979), sample moments against numpy and
scipy.stats.kurtosis."""
import numpy as np
import pytest
import scipy.special
import scipy.stats
from statsmodels.stats.multitest import multipletests

from gradcheck_kit import stochastic_stats as st


@pytest.mark.parametrize("df", [2.0, 15.0, 63.0, 511.0, 4095.0, 1e5])
def test_t_tail_matches_scipy_far_into_the_tail(df):
    t = np.array([0.0, 0.3, 1.0, 2.5, 4.0, 6.0, 9.0, 15.0, 30.0])
    expected = scipy.stats.t.sf(t, df)
    got = st.t_tail(t, df)
    assert np.allclose(got, expected, rtol=1e-9, atol=0)


def test_t_tail_below_zero_is_the_upper_complement():
    assert np.allclose(st.t_tail(np.array([-1.5, -3.0]), 7.0),
                       scipy.stats.t.cdf([1.5, 3.0], 7.0), rtol=1e-12)


@pytest.mark.parametrize("df", [3.0, 15.0, 127.0, 4095.0])
@pytest.mark.parametrize("p", [0.3, 0.05, 1e-3, 1e-6, 1e-10])
def test_t_quantile_matches_scipy(p, df):
    assert st.t_quantile(p, df) == pytest.approx(scipy.stats.t.isf(p, df), rel=1e-9)


def test_t_quantile_refuses_p_outside_its_range():
    with pytest.raises(ValueError, match="0 < p < 0.5"):
        st.t_quantile(0.7, 10.0)


@pytest.mark.parametrize("a, b", [(0.5, 0.5), (2.0, 3.0), (7.5, 0.5), (0.5, 40.0), (300.0, 0.5)])
def test_regularized_beta_matches_scipy(a, b):
    x = np.array([0.0, 1e-6, 0.01, 0.2, 0.5, 0.8, 0.99, 1.0])
    assert np.allclose(st.regularized_beta(x, a, b), scipy.special.betainc(a, b, x),
                       rtol=1e-10, atol=1e-15)


def test_holm_rejects_what_statsmodels_rejects():
    rng = np.random.default_rng(0)
    for _ in range(10):
        p = np.concatenate([rng.random(8), rng.random(4) * 1e-3])
        expected = multipletests(p, alpha=0.05, method="holm")[0]
        assert st.holm(p, 0.05).tolist() == expected.tolist()


def test_holm_leaves_untested_coordinates_out_of_the_family():
    p = np.array([0.01, np.nan, 0.02])
    # m = 2 tested: 0.01 <= 0.05/2 and 0.02 <= 0.05/1; with NaN counted (m=3) 0.02 would fail
    assert st.holm(p, 0.05).tolist() == [True, False, True]


def test_spending_sums_to_the_level_and_grows_with_the_rounds():
    shares = st.spending([64, 128, 256, 512, 1024, 2048, 4096])
    assert shares.sum() == pytest.approx(1.0) and np.all(np.diff(shares) > 0)


def test_moments_in_rounds_match_numpy_and_scipy():
    rng = np.random.default_rng(1)
    draws = rng.standard_t(5, size=(1000, 3)) * [1.0, 1e-3, 50.0] + [1e6, 0.0, -3.0]
    m = st.Moments(3)
    for lo, hi in ((0, 64), (64, 300), (300, 1000)):
        m.add(draws[lo:hi], np.arange(lo, hi))
    s = st.summarize(m)
    assert np.allclose(s.mean, draws.mean(axis=0), rtol=1e-12)
    assert np.allclose(s.std, draws.std(axis=0, ddof=1), rtol=1e-9)
    assert np.allclose(s.kurtosis, scipy.stats.kurtosis(draws, axis=0, fisher=False),
                       rtol=1e-6)
    groups = np.array([draws[k::st.GROUPS].mean(axis=0) for k in range(st.GROUPS)])
    assert np.allclose(s.batch_error, groups.std(axis=0, ddof=1) / np.sqrt(st.GROUPS),
                       rtol=1e-9)


def test_heavy_tails_switch_on_the_batch_means_and_normal_draws_do_not():
    rng = np.random.default_rng(2)
    heavy = np.exp(2.0 * rng.standard_normal((512, 1)))     # lognormal, kurtosis in the 1000s
    normal = rng.standard_normal((512, 1))
    for values, robust in ((heavy, True), (normal, False)):
        m = st.Moments(1)
        m.add(values, np.arange(512))
        assert bool(st.summarize(m).robust[0]) is robust


def test_the_p_value_allows_for_the_reference_error():
    rng = np.random.default_rng(3)
    m = st.Moments(1)
    m.add(rng.standard_normal((400, 1)) + 0.5, np.arange(400))
    s = st.summarize(m)
    bias = s.mean - 0.0
    assert st.bias_p_values(bias, np.array([0.0]), s)[0] < 1e-6
    assert st.bias_p_values(bias, np.array([0.6]), s)[0] == 1.0   # within the reference's error
