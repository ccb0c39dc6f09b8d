"""Memory a run's draws will take, checked before any sampling.

The draws of every model, their pointwise log-likelihood terms for LOO and the predictive
checks grow with ``draws x chains``; a setting such as ``draws = 10**12`` or ``chains =
100000`` is refused up front with the option and the limit named, instead of dying with
``MemoryError`` after the reference fits, or running on for days.

The estimate, in bytes, for ``S = draws x chains`` draws::

    8 S (P + 12 + 8 L) + 8 ppc_draws (n + N) + 1 MB x chains

``P`` parameters per draw (the largest model's terms, the scale parameters and, for
latent-effect models, one effect per unit), 12 sampler statistics per draw, ``L`` the
pointwise terms of LOO at the chosen level (rows at the occasion level, units at the unit
level, the sub-sample out of core). The factor 8 on ``L`` was measured: on the wage panel
of linearmodels (4,360 rows), a pooled fit's peak resident memory grew by 240 kB per draw
from 400 to 4,000 draws, seven times the 35 kB of one row of terms (the log-likelihood,
the smoothed weights and the copies PSIS makes). It is compared with the memory the
system reports available (``MemAvailable``, or the cgroup limit if lower).
"""

from __future__ import annotations

import os
from pathlib import Path

from .errors import SpecificationError

__all__ = ["estimate_bytes", "available_bytes", "check_run_memory"]

_STATS_PER_DRAW = 12
_POINTWISE_COPIES = 8
_PER_CHAIN = 1 << 20


def available_bytes() -> int | None:
    """Memory available to this process now (bytes), or ``None`` if unknown."""
    avail = None
    try:
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith("MemAvailable:"):
                avail = int(line.split()[1]) * 1024
                break
    except (OSError, ValueError, IndexError):
        pass
    if avail is None:
        try:
            avail = os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
        except (ValueError, OSError, AttributeError):
            return None
    try:  # a container's limit (cgroup v2)
        limit = Path("/sys/fs/cgroup/memory.max").read_text().strip()
        used = int(Path("/sys/fs/cgroup/memory.current").read_text().strip())
        if limit != "max":
            avail = min(avail, max(int(limit) - used, 0))
    except (OSError, ValueError):
        pass
    return avail


def estimate_bytes(draws: int, chains: int, params: int, points: int, ppc_draws: int = 0,
                   rows: int = 0, units: int = 0) -> int:
    """Bytes the draws of one model take (see the module docstring)."""
    per_draw = 8 * (params + _STATS_PER_DRAW + _POINTWISE_COPIES * points)
    return (int(draws) * int(chains) * per_draw + 8 * int(ppc_draws) * (rows + units)
            + int(chains) * _PER_CHAIN)


def _gb(b: float) -> str:
    return f"{b / 1e9:.3g} GB" if b < 1e12 else f"{b / 1e12:,.0f} TB"


def check_run_memory(settings, design, available: int | None = None) -> None:
    """Refuse ``draws``/``chains`` whose draws would not fit in memory (before sampling).

    Raises :class:`~bayespanel.core.errors.SpecificationError` naming ``draws`` and
    ``chains``, the estimate, the memory available and the largest values that fit.
    """
    if not settings.models:
        return
    available = available_bytes() if available is None else available
    if available is None:
        return
    n, N = int(design.n), int(design.n_units)
    points = n if settings.level == "occasion" else N
    if not design.has_rows:  # sub-sampled LOO
        points = min(settings.loo_observations or 400, points)
    params = len(design.terms) * 2 + 3 + N  # hybrid terms at most double; unit effects
    ppc = settings.ppc_draws if design.has_rows else 0
    need = estimate_bytes(settings.draws, settings.chains, params, points, ppc, n, N)
    if need <= available:
        return
    per_draw = estimate_bytes(1, 1, params, points) - _PER_CHAIN
    fixed = 8 * ppc * (n + N)
    room = max(available - fixed, 0)
    max_draws = max(int((room - settings.chains * _PER_CHAIN) // (per_draw * settings.chains)), 0)
    max_chains = max(int(room // (per_draw * settings.draws + _PER_CHAIN)), 0)
    fix = []
    if max_draws >= 1:
        fix.append(f"draws at most {max_draws} with chains={settings.chains}")
    if max_chains >= 1:
        fix.append(f"chains at most {max_chains} with draws={settings.draws}")
    if 8 * ppc * (n + N) > available / 2:
        fix.append("fewer ppc_draws")
    raise SpecificationError(
        f"draws={settings.draws} x chains={settings.chains}: the draws of each model and "
        f"their {points} pointwise LOO terms would need about {_gb(need)} of memory, more "
        f"than the {_gb(available)} available; lower them ("
        + ("; ".join(fix) or "or use --out-of-core") + ")")
