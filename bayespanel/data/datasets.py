"""The demo scenario: a simulated panel of clinics with known true values.

The scenario is our own invention. Clinics are observed quarterly; the outcome is a
patient-satisfaction score. Staffing has a *between* effect (better-staffed clinics are
better run in general) larger than its *within* effect (adding staff to a given clinic
helps less), so random-intercept estimates that pool the two are biased while fixed
effects and the within-between model recover the within effect. Caseload has equal
within and between effects. Rurality does not vary within clinics. Some clinics join
late or leave early, a few skip a quarter, and some caseload values are missing.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..core.mathcore import intraclass_correlation

__all__ = ["clinic_panel", "simulate_outcome"]

DEMO_FORMULA = "satisfaction ~ staffing + caseload + rural"


def clinic_panel(n_clinics: int = 36, n_quarters: int = 8, seed: int = 2026,
                 sigma_unit: float = 4.0, sigma_obs: float = 3.0,
                 missing_rate: float = 0.03):
    """Simulate the demo panel.

    Parameters
    ----------
    n_clinics, n_quarters : int
        Number of units and of possible occasions.
    seed : int
        Seed of the generator; the same seed gives the same table.
    sigma_unit, sigma_obs : float
        True SDs of the clinic intercepts and of the occasion-level noise.
    missing_rate : float
        Share of rows whose ``caseload`` is set missing.

    Returns
    -------
    (DataFrame, dict)
        The long table (columns ``clinic``, ``quarter``, ``satisfaction``, ``staffing``,
        ``caseload``, ``rural``) and the true values: ``formula``, ``unit``, ``time``,
        ``intercept``, ``within`` and ``between`` effects by covariate, ``constant``
        effects, ``sigma_unit``, ``sigma_obs`` and ``icc``.
    """
    rng = np.random.default_rng(seed)
    truth = {
        "formula": DEMO_FORMULA,
        "unit": "clinic",
        "time": "quarter",
        "intercept": 60.0,
        "within": {"staffing": 1.5, "caseload": -0.8},
        "between": {"staffing": 4.0, "caseload": -0.8},
        "constant": {"rural": -3.0},
        "sigma_unit": float(sigma_unit),
        "sigma_obs": float(sigma_obs),
        "icc": float(intraclass_correlation(sigma_unit**2, sigma_obs**2)),
    }
    rows = []
    for c in range(n_clinics):
        start = int(rng.choice([1, 1, 1, 1, 2, 3]))
        stop = int(rng.choice([n_quarters, n_quarters, n_quarters, n_quarters - 1, n_quarters - 2]))
        quarters = list(range(start, stop + 1))
        if len(quarters) > 4 and rng.random() < 0.15:  # a skipped quarter
            quarters.pop(int(rng.integers(1, len(quarters) - 1)))
        rural = int(rng.random() < 0.35)
        staff_level = rng.normal(5.0 - 0.6 * rural, 1.0)
        case_level = rng.normal(20.0, 3.0)
        for q in quarters:
            rows.append((f"C{c + 1:02d}", q, staff_level + rng.normal(0, 0.7),
                         case_level + rng.normal(0, 2.0), rural))
    df = pd.DataFrame(rows, columns=["clinic", "quarter", "staffing", "caseload", "rural"])
    df["satisfaction"] = simulate_outcome(df, truth, rng)
    miss = rng.random(len(df)) < missing_rate
    df.loc[miss, "caseload"] = np.nan
    return df[["clinic", "quarter", "satisfaction", "staffing", "caseload", "rural"]], truth


def simulate_outcome(df: pd.DataFrame, truth: dict, rng) -> np.ndarray:
    """Draw the outcome for the covariates in ``df`` from the true values in ``truth``."""
    unit = truth["unit"]
    y = np.full(len(df), truth["intercept"], dtype=float)
    for name, b_w in truth["within"].items():
        means = df.groupby(unit)[name].transform("mean").to_numpy()
        x = df[name].to_numpy()
        y += b_w * (x - means) + truth["between"][name] * means
    for name, b in truth.get("constant", {}).items():
        y += b * df[name].to_numpy()
    codes, uniq = pd.factorize(df[unit])
    u = rng.normal(0, truth["sigma_unit"], len(uniq))
    return y + u[codes] + rng.normal(0, truth["sigma_obs"], len(df))
