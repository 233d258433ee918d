"""Seeded synthetic SUR systems for the benchmarks.

Each equation i has an intercept and K_i - 1 regressors that share two common
factors across equations (so the cross-equation blocks C_ij are not trivial),
and errors driven by three common shocks plus an idiosyncratic part, with
equation-specific scales, so Omega is dense with correlations roughly in
[-0.6, 0.6].  Arrays are filled in place, one equation at a time, so generating
even the largest case needs little memory beyond the data itself.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

# name -> (N, T, K_i)
CASES = {
    "a": (5, 200, 4),
    "b": (10, 1000, 5),
    "c": (50, 5000, 6),
    "d": (1000, 2000, 4),
}
SEED = 20240611


@dataclass
class System:
    name: str
    N: int
    T: int
    k: int
    names: list
    ys: list
    Xs: list

    @property
    def ks(self):
        return np.full(self.N, self.k, dtype=np.intp)

    @property
    def K(self):
        return self.N * self.k

    @property
    def P(self):
        return self.K + self.N

    @property
    def input_bytes(self):
        return sum(y.nbytes for y in self.ys) + sum(X.nbytes for X in self.Xs)

    def as_dict(self):
        return {n: (y, X) for n, y, X in zip(self.names, self.ys, self.Xs)}

    def stacked(self, order="C"):
        """W = [X_1 .. X_N, y_1 .. y_N] (T x P), in the requested memory order."""
        W = np.empty((self.T, self.P), order=order)
        c = 0
        for X in self.Xs:
            W[:, c:c + X.shape[1]] = X
            c += X.shape[1]
        for y in self.ys:
            W[:, c] = y
            c += 1
        return W


def make_case(name: str, *, seed: int = SEED, order: str = "C") -> System:
    N, T, k = CASES[name]
    rng = np.random.default_rng([seed, ord(name)])
    n_xf, n_ef = 2, 3
    Fx = rng.standard_normal((T, n_xf))       # regressor factors
    Fe = rng.standard_normal((T, n_ef))       # error factors
    lam = rng.normal(0.0, 0.8, size=(N, n_ef))
    scale = rng.uniform(0.5, 2.0, size=N)
    names = [f"eq{i:04d}" for i in range(N)]
    ys, Xs = [], []
    for i in range(N):
        X = np.empty((T, k), order=order)
        X[:, 0] = 1.0
        X[:, 1:] = rng.standard_normal((T, k - 1))
        X[:, 1:] += Fx @ rng.normal(0.0, 0.6, size=(n_xf, k - 1))
        beta = rng.uniform(-2.0, 2.0, size=k)
        u = Fe @ lam[i]
        u += rng.standard_normal(T)
        u *= scale[i]
        y = X @ beta
        y += u
        Xs.append(X)
        ys.append(y)
    return System(name, N, T, k, names, ys, Xs)
