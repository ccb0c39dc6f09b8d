"""Property-based checks (hypothesis) of Panel, Design and sufficient statistics.

Invariances that any correct panel estimator must have (published identities of least
squares: Frisch-Waugh-Lovell and the invariance of slopes to location shifts of the
covariates): row order, unit relabelling and occasion relabelling change no estimate;
adding a constant to a covariate changes only the intercept. Estimates are checked with
the reference module's closed-form fits when it is present and with least squares on the
sufficient statistics (numpy) always; the latter is checked against statsmodels OLS.

Reference: statsmodels OLS (pooled least squares on the same rows); identities as above
(Frisch-Waugh-Lovell, Davidson and MacKinnon 2004, section 2.4).
"""

import warnings

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import bayespanel as bp
from bayespanel.core import derived

FORMULA = "y ~ x + z + w"


@st.composite
def panels(draw):
    N = draw(st.integers(6, 10))  # Swamy-Arora needs between df
    T = draw(st.lists(st.integers(2, 5), min_size=N, max_size=N))
    seed = draw(st.integers(0, 2**31 - 1))
    rng = np.random.default_rng(seed)
    rows = []
    for i, Ti in enumerate(T):
        occ = np.sort(rng.choice(np.arange(2000, 2008), size=Ti, replace=False))
        a, w = rng.normal(), rng.normal()
        for t in occ:
            x, z = rng.normal() + a, rng.normal()
            rows.append((f"u{i}", int(t), x, z, w, 1 + x - 0.5 * z + w + a + rng.normal()))
    return pd.DataFrame(rows, columns=["unit", "occ", "x", "z", "w", "y"])


def within_ols(stats):
    """Fixed-effects slopes from the within block of the sufficient statistics."""
    W = stats.within
    k = W.shape[0] - 1
    idx = [j for j in range(k) if W[j, j] > 1e-9 * max(W[-1, -1], 1.0)]
    return np.linalg.solve(W[np.ix_(idx, idx)], W[idx, -1])


def pooled_ols(stats):
    """Pooled least squares slopes and intercept from centred totals (intercept first column)."""
    C = stats.total
    b = np.linalg.solve(C[1:-1, 1:-1], C[1:-1, -1])
    a = stats.mean[-1] - stats.mean[1:-1] @ b
    return a, b


def fits(df):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        d = bp.Panel(df, unit="unit", time="occ").design(FORMULA)
    stats = derived.from_design(d, "random")
    out = {"within": within_ols(stats), "pooled": pooled_ols(stats)}
    import statsmodels.api as sm  # reference library: statsmodels OLS on the same rows

    ols = sm.OLS(d.y, d.X).fit().params
    np.testing.assert_allclose(np.hstack(out["pooled"]), ols, rtol=1e-7, atol=1e-9)
    ref = getattr(bp, "reference", None)
    if ref is not None and hasattr(ref, "within"):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            panel = bp.Panel(df, unit="unit", time="occ")
            out["ref_within"] = ref.within(panel, FORMULA).coef.to_numpy()
            out["ref_random"] = ref.random(panel, FORMULA).coef.to_numpy()
    return out, stats


def assert_same(a, b):
    for key in a:
        np.testing.assert_allclose(np.hstack(a[key]).astype(float),
                                   np.hstack(b[key]).astype(float), rtol=1e-8, atol=1e-10)


SETTINGS = settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])


@SETTINGS
@given(panels(), st.integers(0, 2**31 - 1))
def test_row_order_does_not_matter(df, seed):
    base, s0 = fits(df)
    shuffled, s1 = fits(df.sample(frac=1.0, random_state=seed % (2**32 - 1)))
    assert_same(base, shuffled)
    np.testing.assert_allclose(s0.within, s1.within, rtol=1e-10, atol=1e-10)


@SETTINGS
@given(panels(), st.randoms(use_true_random=False))
def test_unit_and_occasion_relabelling(df, rnd):
    base, _ = fits(df)
    units = sorted(df["unit"].unique())
    new = list(units)
    rnd.shuffle(new)
    relabelled = df.assign(unit=df["unit"].map(dict(zip(units, [f"z{n}" for n in new]))),
                           occ=df["occ"] * 10 + 7)  # order-preserving occasion relabel
    other, _ = fits(relabelled)
    assert_same(base, other)


@SETTINGS
@given(panels(), st.floats(-1e4, 1e4).filter(lambda c: abs(c) > 1e-3))
def test_shifting_a_covariate_moves_only_the_intercept(df, c):
    base, _ = fits(df)
    shifted, _ = fits(df.assign(x=df["x"] + c))
    np.testing.assert_allclose(base["within"], shifted["within"], rtol=1e-7, atol=1e-9)
    a0, b0 = base["pooled"]
    a1, b1 = shifted["pooled"]
    np.testing.assert_allclose(b0, b1, rtol=1e-7, atol=1e-9)
    # the intercept moves by exactly -c times the x slope
    assert a1 == pytest.approx(a0 - c * b0[0], rel=1e-7, abs=1e-7)
    for key in ("ref_within", "ref_random"):
        if key in base:
            slopes0, slopes1 = base[key], shifted[key]
            if key == "ref_random":
                np.testing.assert_allclose(slopes0[1:], slopes1[1:], rtol=1e-6, atol=1e-8)
                assert slopes1[0] == pytest.approx(slopes0[0] - c * slopes0[1], rel=1e-6, abs=1e-6)
            else:
                np.testing.assert_allclose(slopes0, slopes1, rtol=1e-6, atol=1e-8)
