"""Reference checks of the estimators against numpy (tests only).

Each test feeds transitions to the C driver tests/reference/drive.c (path in $WORTH_DRIVE)
and compares the weights it prints with the same quantity computed by numpy; every check
names its reference beside it.  Run with Debian's /usr/bin/python3 (numpy 1.24, pytest 7.2).
"""
import os
import subprocess

import numpy as np
import pytest
from numpy.testing import assert_allclose

GAMMA = 0.9


def drive(kind, n, phi, r, phi_next, g, terminal, every=None, **params):
    """Runs the driver on the given transitions; returns (weights, stats dict).

    weights is (N,) without every, else (checkpoints, N)."""
    exe = os.environ.get("WORTH_DRIVE")
    assert exe, "set WORTH_DRIVE to the path of the drive executable"
    m = len(r)
    rec = np.column_stack([phi, r, phi_next, np.broadcast_to(g, (m,)), terminal])
    assert rec.shape == (m, 2 * n + 3)
    args = [exe, kind, str(n)] + [f"{k}={v!r}" if isinstance(v, float) else f"{k}={v}"
                                  for k, v in params.items()]
    if every:
        args += ["--every", str(every)]
    p = subprocess.run(args, input=rec.astype("<f8").tobytes(), capture_output=True, timeout=120)
    assert p.returncode == 0, f"{args[1:]} exited {p.returncode}: {p.stderr.decode()}"
    w = np.array([[float(v) for v in line.split()] for line in p.stdout.decode().splitlines()])
    line = [s for s in p.stderr.decode().splitlines() if s.startswith("stats: ")][-1]
    stats = {k: int(v) for k, v in (kv.split("=") for kv in line.split()[1:])}
    return (w if every else w.ravel()), stats


def rel_err(w, ref):
    return np.linalg.norm(w - ref, axis=-1) / np.linalg.norm(ref)


def assert_rel(w, ref, tol):
    """Every component within tol * |ref| (largest row of ref); prints both on failure."""
    assert_allclose(w, ref, rtol=0, atol=tol * np.linalg.norm(ref, axis=-1).max())
    print(f"relative error {rel_err(w, ref).max():.3g} (tolerance {tol:g})")


def birkhoff(rng, S, k):
    """k random permutations and P, their average: doubly stochastic, so uniform is stationary."""
    perms = [rng.permutation(S) for _ in range(k)]
    P = np.zeros((S, S))
    for sig in perms:
        P[np.arange(S), sig] += 1.0 / k
    return perms, P


def mrp_case(seed=1, S=8, k=3, N=4):
    """Random MRP, its expected data (each s -> sigma_j(s) once) and its TD fixed point."""
    rng = np.random.default_rng(seed)
    perms, P = birkhoff(rng, S, k)
    Phi, R = rng.normal(size=(S, N)), rng.normal(size=S)
    # Premise: the uniform distribution is stationary for P (Birkhoff-von Neumann).
    assert_allclose(np.full(S, 1 / S) @ P, np.full(S, 1 / S), rtol=1e-15)
    s, sn = np.tile(np.arange(S), k), np.concatenate(perms)
    data = (Phi[s], R[s], Phi[sn], GAMMA, np.zeros(S * k))
    D = np.eye(S) / S
    A = Phi.T @ D @ (np.eye(S) - GAMMA * P) @ Phi
    b = Phi.T @ D @ R
    w_td = np.linalg.solve(A, b)  # reference: numpy.linalg.solve (LAPACK gesv)
    return data, A * S * k, b * S * k, w_td


def test_lstd_equals_td_fixed_point():
    (phi, r, phin, g, term), _, _, w_td = mrp_case()
    w, _ = drive("lstd", 4, phi, r, phin, g, term, **{"lambda": 0.0}, ridge=0.0,
                 refit_every=10**6)
    # reference: numpy.linalg.solve of Phi' D (I - gamma P) Phi w = Phi' D R (Tsitsiklis &
    # Van Roy 1997, TD fixed point); the data is that expectation exactly, scaled by S*k.
    assert_rel(w, w_td, 1e-9)


def sm_denominators(z, d, delta):
    """1 + d_t' (I/delta + sum_{u<t} z_u d_u')^-1 z_t: RLS-TD's gain denominators for mu = 1."""
    A, out = np.eye(z.shape[1]) / delta, []
    for zt, dt in zip(z, d):
        out.append(1 + dt @ np.linalg.solve(A, zt))
        A += np.outer(zt, dt)
    return np.array(out)


def rls_sweeps(seed, sweeps=100, delta=1e6):
    """RLS-TD over the expected data of mrp_case(seed) repeated; weights after every sweep,
    stats, the Sherman-Morrison denominators met, the TD fixed point and the ridge path."""
    (phi, r, phin, g, term), A1, b1, w_td = mrp_case(seed)
    m, n = phi.shape
    rep = lambda v: np.tile(v, (sweeps,) + (1,) * (v.ndim - 1))
    w, st = drive("rls_td", n, rep(phi), rep(r), rep(phin), g, rep(term), every=m,
                  forget=1.0, delta=delta, **{"lambda": 0.0})
    assert w.shape == (sweeps, n), w.shape
    den = sm_denominators(rep(phi), rep(phi - GAMMA * phin), delta)
    # reference: numpy.linalg.solve of (j A1 + I/delta) w = j b1 after j sweeps: with mu = 1 and
    # w0 = 0, RLS-TD is ridge LSTD with eps = 1/delta after every step (Sherman-Morrison).
    ridge = np.array([np.linalg.solve(j * A1 + np.eye(n) / delta, j * b1)
                      for j in range(1, sweeps + 1)])
    return w, st, den, w_td, ridge


def test_rls_td_converges_to_td_fixed_point():
    w, st, den, w_td, ridge = rls_sweeps(seed=5)
    # Premise: every gain denominator is positive, so rls.c's guard has no cause to act.
    assert den.min() > 0.1 and st["guarded"] == 0, (den.min(), st)
    err = rel_err(w, w_td)
    print("relative error after 1, 10, 100 sweeps:", err[[0, 9, 99]])
    # reference: numpy.linalg.solve (TD fixed point, as above); the error must shrink with data.
    assert err[0] > err[9] > err[99], err[[0, 9, 99]]
    assert err[99] < 1e-6, err[99]
    assert_rel(w, ridge, 1e-9)


def test_rls_td_is_ridge_lstd_with_negative_denominator():
    w, st, den, w_td, ridge = rls_sweeps(seed=1)
    # Premise: a denominator is negative but far from 0, so Sherman-Morrison is well posed.
    assert den.min() < -1 and np.abs(den).min() > 0.1, den
    print("guarded", st["guarded"], "denominators", den[:6])
    assert_rel(w, ridge, 1e-9)
    assert rel_err(w[-1], w_td) < 1e-6


def test_lstd_tabular_equals_true_values():
    rng = np.random.default_rng(2)
    S = 8
    # Transition counts: P = C / row sums, not doubly stochastic; rows weigh differently.
    C = rng.integers(0, 4, size=(S, S))
    C[np.arange(S), rng.integers(S, size=S)] += 1
    P = C / C.sum(axis=1, keepdims=True)
    Rm = rng.normal(size=(S, S))  # reward of s -> s'
    s, sn = np.divmod(rng.permutation(np.repeat(np.arange(S * S), C.ravel())), S)
    I = np.eye(S)
    w, _ = drive("lstd", S, I[s], Rm[s, sn], I[sn], GAMMA, np.zeros(len(s)),
                 **{"lambda": 0.0}, ridge=0.0, refit_every=10**6)
    # reference: numpy.linalg.solve of the Bellman equation (I - gamma P) V = E[r | s].
    v_true = np.linalg.solve(I - GAMMA * P, (P * Rm).sum(axis=1))
    assert_rel(w, v_true, 1e-9)


@pytest.mark.parametrize("kind,params", [
    ("rls_td", {"forget": 1.0, "delta": 1e8}),
    ("lstd", {"ridge": 0.0, "refit_every": 10**6}),
])
def test_gamma_zero_is_least_squares(kind, params):
    rng = np.random.default_rng(3)
    X = rng.normal(size=(200, 5))
    y = X @ rng.normal(size=5) + 0.3 * rng.normal(size=200)
    # g = 0: d = phi and, with lambda = 0, z = phi; phi_next is random and must not matter.
    w, _ = drive(kind, 5, X, y, rng.normal(size=(200, 5)), 0.0, np.zeros(200),
                 **{"lambda": 0.0}, **params)
    w_ls = np.linalg.lstsq(X, y, rcond=None)[0]  # reference: numpy.linalg.lstsq (LAPACK gelsd)
    assert_rel(w, w_ls, 1e-6)


def episodes(rng, S, count, p_end=0.25):
    """Random episodes on S states; returns per-step arrays s, s', r, g, terminal, return G."""
    P = rng.dirichlet(np.ones(S), size=S)
    R = rng.normal(size=S)
    s, sn, r, g, term, G = [], [], [], [], [], []
    for _ in range(count):
        x, start = rng.integers(S), len(r)
        while True:
            s.append(x)
            x = rng.choice(S, p=P[x])
            sn.append(x)
            r.append(R[s[-1]] + rng.normal())
            g.append(rng.uniform(0.8, 1.0))
            term.append(rng.random() < p_end)
            if term[-1]:
                break
        ret, back = 0.0, []  # discounted return of each step, backwards: G_t = r_t + g_t G_t+1
        for t in reversed(range(start, len(r))):
            ret = r[t] + (0.0 if term[t] else g[t] * ret)
            back.append(ret)
        G += back[::-1]
    return tuple(map(np.array, (s, sn, r, g, term, G)))


@pytest.mark.parametrize("features", ["tabular", "random"])
def test_lstd_lambda1_is_monte_carlo_regression(features):
    # LSTD(1) on complete episodes: A = sum z_t d_t' telescopes to sum phi_t phi_t' and
    # b = sum z_t r_t to sum phi_t G_t (Boyan 2002), i.e. least squares of returns on features.
    rng = np.random.default_rng(4)
    S = 6
    s, sn, r, g, term, G = episodes(rng, S, 80)
    Phi = np.eye(S) if features == "tabular" else rng.normal(size=(S, 3))
    N = Phi.shape[1]
    # A terminal step's phi_next is ignored: give it garbage.
    phin = np.where(term[:, None], rng.normal(size=(len(s), N)), Phi[sn])
    w, _ = drive("lstd", N, Phi[s], r, phin, g, term.astype(float), **{"lambda": 1.0},
                 ridge=0.0, refit_every=10**6)
    if features == "tabular":
        counts = np.bincount(s, minlength=S)
        assert counts.min() > 0, counts
        ref = np.bincount(s, weights=G, minlength=S) / counts  # reference: every-visit MC mean
    else:
        ref = np.linalg.lstsq(Phi[s], G, rcond=None)[0]  # reference: numpy.linalg.lstsq (gelsd)
    assert_rel(w, ref, 1e-9)
