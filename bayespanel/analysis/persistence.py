"""AR(1) errors near a random walk: when the unit variance and the persistence blur.

With ``errors="ar1"`` a unit's rows share two things that make them move together: the
unit intercept (variance ``sigma_unit^2``, the same for every pair of occasions) and the
AR(1) errors (covariance ``sigma_obs^2 rho^d``, falling with the distance ``d``). When
``rho`` is near 1 the AR(1) covariance hardly falls over a panel's few occasions, so it
looks like a unit intercept too: the data cannot tell the two apart well, the posterior
trades one for the other, and the unit SD (and the ICC, the unit variance's share) can
collapse towards zero while a reference fit with independent errors puts most of the
variance in the unit intercept. The ICC is then not a reliable summary of the data.

:func:`near_unit_root` flags a posterior of ``rho`` whose mean is at least
:data:`RHO_HIGH` (0.9) or whose draws lie at or above it in at least :data:`SHARE_HIGH`
(half) of the draws. The cut-off is our rule, not a test. Applied time series commonly
reads an autoregressive coefficient of about 0.95 or more as "near a unit root", but the
posterior of a stationary AR(1) sits below 1 even when the errors are a random walk:
on simulated panels of 40 units whose errors were exact random walks (rho = 1, unit SD 1,
tests/test_persistence.py) the posterior mean of rho was 0.90 with 8 occasions, 0.93
with 12 and 0.95 with 20, while the ICC fell to 0.09-0.14. A cut-off of 0.95 would miss
most of them, hence 0.9. The usual remedies are a lagged outcome among the covariates
(``lag(y)``, whose initial conditions the package handles) or modelling the differences
of the outcome.
"""

from __future__ import annotations

import numpy as np

__all__ = ["RHO_HIGH", "SHARE_HIGH", "near_unit_root", "persistence_notes"]

#: a posterior mean of rho at or above this is flagged (our rule; see the module docstring)
RHO_HIGH = 0.9

#: ... as is a posterior with at least this share of its draws at or above RHO_HIGH
SHARE_HIGH = 0.5


def near_unit_root(rho_draws, *, title: str = "The model", icc=None,
                   threshold: float = RHO_HIGH, share: float = SHARE_HIGH) -> str | None:
    """A plain-language note when the posterior of ``rho`` sits near 1, else ``None``.

    Parameters
    ----------
    rho_draws : array
        Posterior draws of ``rho`` (any shape).
    title : str
        The model's name, opening the note.
    icc : float, optional
        The model's posterior mean ICC, quoted when given.
    threshold, share : float
        Flag when the mean of the draws is at least ``threshold`` or at least ``share`` of
        them are (defaults :data:`RHO_HIGH`, :data:`SHARE_HIGH`).

    Returns
    -------
    str or None
    """
    d = np.asarray(rho_draws, dtype=float).ravel()
    d = d[np.isfinite(d)]
    if d.size == 0:
        return None
    mean, above = float(d.mean()), float(np.mean(d >= threshold))
    if mean < threshold and above < share:
        return None
    icc_text = ("" if icc is None or not np.isfinite(icc)
                else f" (its posterior mean here is {icc:.2f})")
    return (f"{title}: the errors' correlation one time unit apart (rho) is close to 1 "
            f"(posterior mean {mean:.3f}; {above:.0%} of draws at or above {threshold:g}), "
            "so the errors behave almost like a random walk. Then the unit variance and the "
            "AR(1) persistence are hard to tell apart (both make a unit's rows move "
            "together), the unit SD is poorly determined, and the ICC is not a reliable "
            f"summary{icc_text}. Consider a lagged outcome among the covariates (lag(y)) or "
            "modelling the differences of the outcome.")


def persistence_notes(posteriors: dict, titles: dict | None = None) -> list[str]:
    """:func:`near_unit_root` for every posterior with ``errors="ar1"``.

    Parameters
    ----------
    posteriors : dict
        Model name -> posterior (:class:`bayespanel.bayes.posterior.Posterior`).
    titles : dict, optional
        Model name -> title used in the notes (default: the name).

    Returns
    -------
    list of str
        One note per flagged model.
    """
    out = []
    for name, post in posteriors.items():
        names = getattr(post, "parameter_names", [])
        if "rho" not in names:
            continue
        icc = float(np.mean(post.draws("icc"))) if "icc" in names else None
        note = near_unit_root(post.draws("rho"), title=(titles or {}).get(name, name), icc=icc)
        if note:
            out.append(note)
    return out
