"""Independent equilibrium solver for the Aiyagari (1994) benchmark, in plain numpy (and scipy's brentq).

The economy of Aiyagari (1994), QJE 109(3), section IV: households with CRRA utility of relative risk
aversion ``mu`` (log at ``mu = 1``), discount factor β = 0.96, earning ``w l`` where log labour endowment is
an AR(1) of persistence ``rho`` and *unconditional* standard deviation ``sd`` (the paper's σ), discretised by
Tauchen (1986) with 7 states spanning ±3 unconditional standard deviations; they save in one asset with a
zero borrowing limit.  A Cobb–Douglas firm (capital share α = 0.36, depreciation δ = 0.08) sets
``r = α (K / L)^(α - 1) - δ`` and ``w = (1 - α) (K / L)^α``, ``L`` the mean endowment.  The equilibrium
interest rate equates households' mean assets with the firm's capital demand ``K(r) = L (α / (r + δ))^(1 / (1 - α))``;
the saving rate is ``δ K / Y = δ α / (r + δ)``.

The household is solved by the endogenous grid method (Carroll 2006) on a fine asset grid, its stationary
distribution over Young's (2010) lotteries by one sparse LU (scipy), and the interest rate by scipy's
``brentq``.  Nothing here imports fixq: it is the independent side of the comparison.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import sparse
from scipy.optimize import brentq
from scipy.sparse.linalg import spsolve
from scipy.special import ndtr

BETA = 0.96
"""Discount factor (Aiyagari 1994)."""
ALPHA = 0.36
"""Capital share (Aiyagari 1994)."""
DELTA = 0.08
"""Depreciation rate (Aiyagari 1994)."""
STATES = 7
"""Points of the labour-endowment chain (Aiyagari 1994: seven-state Tauchen)."""
WIDTH = 3.0
"""Half-width of the Tauchen grid in unconditional standard deviations (Aiyagari 1994)."""
ASSET_MAX = 60.0
"""Top of the asset grid (units of the wage bill per worker, about 1.2): far above where the stationary
distribution has mass in every cell of the panel (checked: the mass in the top tenth of the grid is printed
by the bench as ``top mass``)."""
ASSET_EXPONENT = 2.0
"""Power of the asset grid's spacing (points dense near the borrowing limit; common practice)."""
POINTS = 4000
"""Asset points of the independent solve (the issue's reference used 4,000)."""
POLICY_TOLERANCE = 1e-11
"""The endogenous grid iteration stops when consumption moves less than this anywhere."""
DISTRIBUTION_TOLERANCE = 1e-12
"""Largest accepted residual ‖πQ − π‖₁ of the stationary distribution."""
R_BRACKET = (0.0, 0.0416)
"""brentq's bracket on the interest rate: below 1/β - 1 = 0.041667, where mean assets grow without bound; the
top end stays a little under it, where the household's problem still settles in reasonable time."""
R_TOLERANCE = 1e-10
"""brentq's tolerance on the interest rate."""


def tauchen(rho: float, sd: float, points: int = STATES, width: float = WIDTH) -> tuple[np.ndarray, np.ndarray]:
    """Tauchen (1986): log endowment values (evenly spaced over ±width·sd) and the transition matrix."""
    sigma = sd * math.sqrt(1.0 - rho * rho)
    z = np.linspace(-width * sd, width * sd, points)
    step = z[1] - z[0]
    upper = ndtr((z[None, :] + step / 2 - rho * z[:, None]) / sigma)
    lower = ndtr((z[None, :] - step / 2 - rho * z[:, None]) / sigma)
    matrix = upper - lower
    matrix[:, 0] = upper[:, 0]
    matrix[:, -1] = 1.0 - lower[:, -1]
    return z, matrix


def stationary_chain(matrix: np.ndarray) -> np.ndarray:
    """The chain's stationary law: the left eigenvector of eigenvalue 1, normalised."""
    values, vectors = np.linalg.eig(matrix.T)
    v = np.real(vectors[:, np.argmin(np.abs(values - 1.0))])
    return v / v.sum()


@dataclass
class Economy:
    rho: float
    sd: float
    mu: float
    points: int = POINTS

    def __post_init__(self) -> None:
        z, self.P = tauchen(self.rho, self.sd)
        self.endowment = np.exp(z)
        self.L = float(stationary_chain(self.P) @ self.endowment)
        self.grid = ASSET_MAX * np.linspace(0.0, 1.0, self.points) ** ASSET_EXPONENT
        self._c: np.ndarray | None = None  # the last consumption policy: the next solve starts there

    def capital_demand(self, r: float) -> float:
        return self.L * (ALPHA / (r + DELTA)) ** (1.0 / (1.0 - ALPHA))

    def wage(self, r: float) -> float:
        return (1.0 - ALPHA) * (ALPHA / (r + DELTA)) ** (ALPHA / (1.0 - ALPHA))

    def savings(self, r: float) -> np.ndarray:
        """Next period's assets at every (grid asset, endowment), by the endogenous grid method."""
        grid, e, P, mu = self.grid, self.endowment, self.P, self.mu
        cash = (1.0 + r) * grid[:, None] + self.wage(r) * e[None, :]
        c = self._c if self._c is not None else cash.copy()  # start: consume all cash on hand
        for _ in range(20_000):
            marginal = (c ** -mu) @ P.T  # E[u'(c(a', l')) | l] at every a' on the grid
            c_today = (BETA * (1.0 + r) * marginal) ** (-1.0 / mu)
            a_today = (c_today + grid[:, None] - self.wage(r) * e[None, :]) / (1.0 + r)
            a_next = np.empty_like(c)
            for j in range(e.size):
                a_next[:, j] = np.interp(grid, a_today[:, j], grid)
                # Below the asset level at which a' = 0 is chosen freely, the borrowing limit binds.
                a_next[grid < a_today[0, j], j] = 0.0
            c_new = cash - a_next
            if np.abs(c_new - c).max() < POLICY_TOLERANCE:
                c = c_new
                break
            c = c_new
        else:
            raise RuntimeError("the endogenous grid iteration did not settle")
        self._c = c
        return cash - c

    def distribution(self, a_next: np.ndarray) -> np.ndarray:
        """Young (2010) lotteries: the stationary joint law of (assets, endowment) on the grid.

        Each next asset level's mass goes to its two neighbouring grid points in proportion to its distance
        from them, then the endowment moves by its chain; ``π = π Q`` is solved by one sparse LU with the
        equation of the state (0, lowest endowment), where the borrowing limit binds for many, replaced by
        ``π_0 = 1``, and the answer normalised (the forward iteration needs 10^4–10^5 steps near r = 1/β - 1).
        """
        grid, P = self.grid, self.P
        n, m = a_next.shape
        lower = np.clip(np.searchsorted(grid, a_next, side="right") - 1, 0, n - 2)
        share = np.clip((a_next - grid[lower]) / (grid[lower + 1] - grid[lower]), 0.0, 1.0)
        rows = np.repeat(np.arange(n * m), 2 * m)
        here = np.stack([lower, lower + 1], axis=-1)  # (n, m, 2)
        weight = np.stack([1.0 - share, share], axis=-1)
        cols = (here[:, :, :, None] * m + np.arange(m)[None, None, None, :]).reshape(-1)
        data = (weight[:, :, :, None] * P[None, :, None, :]).reshape(-1)
        Q = sparse.csr_array((data, (rows, cols)), shape=(n * m, n * m))
        system = (sparse.identity(n * m, format="csr") - Q.T).tolil()
        system[0, :] = 0.0
        system[0, 0] = 1.0
        rhs = np.zeros(n * m)
        rhs[0] = 1.0
        pi = np.maximum(spsolve(system.tocsc(), rhs), 0.0)
        pi /= pi.sum()
        residual = np.abs(Q.T @ pi - pi).sum()
        if residual > DISTRIBUTION_TOLERANCE:
            raise RuntimeError(f"the distribution's residual is {residual:.3g}")
        return pi.reshape(n, m)

    def excess(self, r: float) -> float:
        """Mean assets minus capital demand at ``r``."""
        a_next = self.savings(r)
        self._pi = self.distribution(a_next)
        return float((self._pi * self.grid[:, None]).sum()) - self.capital_demand(r)

    def equilibrium(self) -> tuple[float, float]:
        """The equilibrium interest rate and saving rate δK/Y = δα/(r + δ)."""
        r = brentq(self.excess, *R_BRACKET, xtol=R_TOLERANCE)
        self.top_mass = float(self._pi[self.grid >= 0.9 * ASSET_MAX].sum())
        return r, DELTA * ALPHA / (r + DELTA)
