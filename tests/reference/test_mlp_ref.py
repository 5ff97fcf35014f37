"""Reference checks of the value networks (mlp, ensemble) against numpy (tests only).

numpy_mlp below is an independent implementation of what daemon/learn/mlp.c documents: the
seeded generator (xoshiro256** seeded by splitmix64, Lemire's bounded draw), the Glorot start,
the replay ring, the semi-gradient TD loss, backpropagation, gradient-norm clipping, Adam
with the step-size schedule, the target network and the bootstrap masks.  The C driver
(tests/reference/drive.c, $WORTH_DRIVE) runs worthd's estimator on the same transitions; the
weights must agree to 1e-9 relative.  Run with Debian's /usr/bin/python3.
"""
import itertools
import os
import subprocess

import numpy as np
import pytest

from test_numpy_ref import drive, rel_err

M64 = (1 << 64) - 1


class Rng:
    """xoshiro256** (Blackman & Vigna 2018) seeded through splitmix64, as learn/rng.c."""

    def __init__(self, seed):
        x, self.s = seed & M64, []
        for _ in range(4):
            x = (x + 0x9E3779B97F4A7C15) & M64
            z = x
            z = ((z ^ (z >> 30)) * 0xBF58476D1CE4E5B9) & M64
            z = ((z ^ (z >> 27)) * 0x94D049BB133111EB) & M64
            self.s.append(z ^ (z >> 31))

    @staticmethod
    def _rotl(x, k):
        return ((x << k) | (x >> (64 - k))) & M64

    def next(self):
        s = self.s
        out = (self._rotl((s[1] * 5) & M64, 7) * 9) & M64
        t = (s[1] << 17) & M64
        s[2] ^= s[0]
        s[3] ^= s[1]
        s[1] ^= s[2]
        s[0] ^= s[3]
        s[2] ^= t
        s[3] = self._rotl(s[3], 45)
        return out

    def below(self, bound):  # Lemire 2019, multiply-shift with rejection
        m = self.next() * bound
        if (m & M64) < bound:
            thresh = ((1 << 64) - bound) % bound
            while (m & M64) < thresh:
                m = self.next() * bound
        return m >> 64

    def unit(self):
        return (self.next() >> 11) * 2.0**-53


class NumpyNet:
    """K networks of the given shape trained as mlp.c documents."""

    def __init__(self, n, hidden, act="tanh", members=1, alpha=1e-3, capacity=10000, batch=32,
                 steps_per_obs=1, decay=0.0, seed=1, init=0.0, target_every=0, clip=0.0):
        self.dims = [n] + list(hidden) + [1]
        self.relu = act == "relu"
        self.K, self.alpha, self.cap, self.B = members, alpha, capacity, batch
        self.spo, self.decay, self.target_every, self.clip = steps_per_obs, decay, target_every, clip
        self.nets = [self._start(seed + 2 * k, init) for k in range(members)]
        self.m = [[np.zeros_like(a) for a in net] for net in self.nets]
        self.v = [[np.zeros_like(a) for a in net] for net in self.nets]
        self.tgt = [[a.copy() for a in net] for net in self.nets] if target_every else None
        self.draw = [Rng(seed + 2 * k + 1) for k in range(members)]
        self.mask_rng = Rng(seed + 64)
        self.x, self.xe = np.zeros((capacity, n)), np.zeros((capacity, n))
        self.ret, self.disc = np.zeros(capacity), np.zeros(capacity)
        self.mask = np.ones((capacity, members))
        self.size = self.next = self.steps = 0

    def _start(self, seed, init):
        rng, net = Rng(seed), []
        for l in range(1, len(self.dims)):
            d, dp = self.dims[l], self.dims[l - 1]
            a = np.sqrt(6.0 / (d + dp))  # Glorot & Bengio 2010, uniform
            W = np.array([a * (2.0 * rng.unit() - 1.0) for _ in range(d * dp)]).reshape(d, dp)
            net += [W, np.zeros(d)]
        net[-1][0] = init
        return net

    def _act(self, z):
        return np.maximum(z, 0.0) if self.relu else np.tanh(z)

    def _slope(self, h):
        return (h > 0).astype(float) if self.relu else 1.0 - h * h

    def forward(self, net, X):
        hs = [X]
        for l in range(0, len(net) - 2, 2):
            hs.append(self._act(hs[-1] @ net[l].T + net[l + 1]))
        return hs[-1] @ net[-2][0] + net[-1][0], hs

    def grad(self, net, hs, err):
        g = [None] * len(net)
        g[-2] = (hs[-1].T @ err)[None, :]
        g[-1] = np.array([err.sum()])
        D = np.outer(err, net[-2][0]) * self._slope(hs[-1])
        for l in range(len(net) - 4, -1, -2):
            i = l // 2  # hidden layer i + 1, its input hs[i]
            g[l] = D.T @ hs[i]
            g[l + 1] = D.sum(axis=0)
            if l:
                D = (D @ net[l]) * self._slope(hs[i])
        return g

    def observe(self, x, r, xn, g, terminal):
        i = self.next
        self.x[i] = x
        self.xe[i] = 0.0 if terminal else xn
        self.ret[i], self.disc[i] = r, 0.0 if terminal else g
        if self.K > 1:
            self.mask[i] = [float(self.mask_rng.next() >> 63) for _ in range(self.K)]
        self.next = (i + 1) % self.cap
        self.size = min(self.size + 1, self.cap)
        for _ in range(self.spo):
            self.step()

    def step(self):
        a = self.alpha / (1.0 + self.steps / self.decay) if self.decay > 0 else self.alpha
        t = self.steps + 1
        for k, net in enumerate(self.nets):
            idx = np.array([self.draw[k].below(self.size) for _ in range(self.B)])
            oute, _ = self.forward(self.tgt[k] if self.tgt else net, self.xe[idx])
            y = self.ret[idx] + self.disc[idx] * oute
            out, hs = self.forward(net, self.x[idx])
            err = self.mask[idx, k] * (out - y) / self.B
            g = self.grad(net, hs, err)
            norm = np.sqrt(sum(float((q * q).sum()) for q in g))
            if self.clip > 0 and norm > self.clip:
                g = [q * (self.clip / norm) for q in g]
            c1, c2 = 1.0 - 0.9**t, 1.0 - 0.999**t  # Adam (Kingma & Ba 2015)
            for j in range(len(net)):
                self.m[k][j] = 0.9 * self.m[k][j] + (1.0 - 0.9) * g[j]
                self.v[k][j] = 0.999 * self.v[k][j] + (1.0 - 0.999) * (g[j] * g[j])
                net[j] -= a * (self.m[k][j] / c1) / (np.sqrt(self.v[k][j] / c2) + 1e-8)
        self.steps += 1
        if self.target_every and self.steps % self.target_every == 0:
            self.tgt = [[q.copy() for q in net] for net in self.nets]

    def weights(self):
        return np.concatenate([q.ravel() for net in self.nets for q in net])


def stream(seed, m, n):
    rng = np.random.default_rng(seed)
    X = rng.uniform(size=(m + 1, n))
    phi, phin = X[:-1], X[1:].copy()
    r = np.sin(3 * phi[:, 0]) + phi[:, 1] * phi[:, 2 % n]
    term = (rng.random(m) < 0.05).astype(float)
    return phi, r, phin, 0.9, term


CASES = {
    "mlp tanh, target network, clip, decay": (
        "mlp", dict(hidden=(6, 5), act="tanh", alpha=0.01, capacity=100, batch=8,
                    steps_per_obs=1, decay=50.0, seed=3, init=0.5, target_every=7, clip=1.0)),
    "mlp relu, three layers": (
        "mlp", dict(hidden=(8, 6, 4), act="relu", alpha=0.005, capacity=64, batch=5,
                    steps_per_obs=2, seed=11)),
    "ensemble of 3 on bootstrap masks": (
        "ensemble", dict(hidden=(5,), act="tanh", alpha=0.01, capacity=80, batch=6,
                         steps_per_obs=1, seed=5, members=3, target_every=4)),
}


@pytest.mark.parametrize("case", CASES)
def test_weights_match_numpy(case):
    kind, params = CASES[case]
    n, m = 3, 300
    phi, r, phin, g, term = stream(7, m, n)
    ref = NumpyNet(n, **params)
    for i in range(m):
        ref.observe(phi[i], r[i], phin[i], g, term[i] > 0)
    args = {k: (",".join(map(str, v)) if k == "hidden" else v) for k, v in params.items()}
    w, stats = drive(kind, n, phi, r, phin, g, term, **args)
    assert stats["refits"] == ref.steps
    want = ref.weights()
    # reference: numpy (the network, loss and Adam re-implemented above, numpy.matmul)
    err = rel_err(w, want)
    worst = np.max(np.abs(w - want) / np.maximum(np.abs(want), 1e-300))
    print(f"{case}: {len(w)} weights after {ref.steps} steps, relative error {err:.3g}, "
          f"largest per-weight relative error {worst:.3g}")
    assert err <= 1e-9, (err, worst)


# ---- a chain whose true value is nonlinear in the state ----
#
# Our own plant: a level p on S = 1001 grid points of [0, 1] moves each step by a jump drawn
# uniformly from -20..20 grid points (clipped at the ends); the reward is 1 while p > 0.7,
# gamma 0.95.  The plant reports four sensors x = p + e, e a fresh zero-sum offset (each
# component uniform in +-0.15 before centring), so p = mean(x) and the chain is Markov in x:
# its true value V(mean(x)) is a smoothed step along the diagonal of the 4-D state, solved
# exactly on the grid by numpy.linalg.solve of (I - gamma P) V = R.

S, JUMP, GAMMA_C, DIMS, OFF = 1001, 20, 0.95, 4, 0.15
LEVEL = np.linspace(0, 1, S)
REWARD = (LEVEL > 0.7).astype(float)


def chain_values():
    P = np.zeros((S, S))
    for s in range(S):
        for k in range(-JUMP, JUMP + 1):
            P[s, min(max(s + k, 0), S - 1)] += 1.0 / (2 * JUMP + 1)
    return np.linalg.solve(np.eye(S) - GAMMA_C * P, REWARD)  # reference: numpy.linalg.solve


def sensors(rng, s):
    u = rng.uniform(-OFF, OFF, size=(len(s), DIMS))
    return (LEVEL[s][:, None] + u - u.mean(axis=1, keepdims=True) + OFF) / (1 + 2 * OFF)


def chain_data(seed, m):
    """m transitions of one trajectory, the states normalised to [0, 1]^4 as worthd would."""
    rng = np.random.default_rng(seed)
    s = np.empty(m + 1, dtype=int)
    s[0] = S // 2
    jumps = rng.integers(-JUMP, JUMP + 1, size=m)
    for t in range(m):
        s[t + 1] = min(max(s[t] + jumps[t], 0), S - 1)
    Z = sensors(rng, s)
    return s, Z, REWARD[s[:-1]]


def poly(Z, deg):
    cols = [np.ones(len(Z))]
    for d in range(1, deg + 1):
        for c in itertools.combinations_with_replacement(range(DIMS), d):
            cols.append(np.prod(Z[:, list(c)], axis=1))
    return np.column_stack(cols)


def fourier(Z, order, couple=DIMS):
    ks = [k for k in itertools.product(range(order + 1), repeat=DIMS)
          if sum(1 for v in k if v) <= couple]
    return np.cos(np.pi * Z @ np.array(ks).T)


def rbf(Z, per_dim, width):
    cs = np.array(list(itertools.product(np.linspace(0, 1, per_dim), repeat=DIMS)))
    return np.exp(-((Z[:, None, :] - cs[None]) ** 2).sum(-1) / (2 * width * width))


# Linear bases of at most 200 features on the four normalised sensors.
BASES = {
    "poly degree 3": lambda Z: poly(Z, 3),
    "poly degree 5": lambda Z: poly(Z, 5),
    "fourier order 2": lambda Z: fourier(Z, 2),
    "fourier order 5, pairs": lambda Z: fourier(Z, 5, couple=2),
    "fourier order 49, one dim per term": lambda Z: fourier(Z, 49, couple=1),
    "rbf 3 per dim, width 0.25": lambda Z: rbf(Z, 3, 0.25),
    "rbf 3 per dim, width 0.5": lambda Z: rbf(Z, 3, 0.5),
}


def run_at(kind, n, phi, r, phin, query, tmp_path, **params):
    """Values and sds of worthd's estimator (drive --at) at the query rows."""
    qf = tmp_path / f"query-{kind}.f8"
    qf.write_bytes(np.ascontiguousarray(query, dtype="<f8").tobytes())
    m = len(r)
    rec = np.column_stack([phi, r, phin, np.full(m, GAMMA_C), np.zeros(m)])
    args = [os.environ["WORTH_DRIVE"], kind, str(n)]
    args += [f"{k}={v}" for k, v in params.items()] + ["--at", str(qf)]
    p = subprocess.run(args, input=rec.astype("<f8").tobytes(), capture_output=True, timeout=240)
    assert p.returncode == 0, p.stderr.decode()
    out = np.array([[float(v) for v in line.split()] for line in p.stdout.decode().splitlines()])
    return out[:, 0], out[:, 1]


NET = dict(hidden="16,16", alpha=0.003, batch=64, capacity=20000, steps_per_obs=2, decay=20000.0,
           nstep=4, seed=1)


def test_mlp_beats_the_best_linear_estimator_on_the_chain(tmp_path):
    V = chain_values()
    s, Z, r = chain_data(1, 12000)
    rng = np.random.default_rng(2)
    qs = rng.integers(0, S, size=2000)  # the trajectory's stationary law is uniform here
    Q, Vq = sensors(rng, qs), V[qs]
    lin = {}
    for name, basis in BASES.items():
        F, FQ = basis(Z), basis(Q)
        assert F.shape[1] <= 200, (name, F.shape)
        v, _ = run_at("lstd", F.shape[1], F[:-1], r, F[1:], FQ, tmp_path, ridge=1e-6,
                      refit_every=10**7)
        lin[name] = (F.shape[1], float(np.sqrt(np.mean((v - Vq) ** 2))))
    v, _ = run_at("mlp", DIMS, Z[:-1], r, Z[1:], Q, tmp_path, **NET)
    mlp = float(np.sqrt(np.mean((v - Vq) ** 2)))
    best = min(lin, key=lambda k: lin[k][1])
    for name, (n, e) in lin.items():
        print(f"lstd, {name} ({n} features): RMS value error {e:.4f}")
    print(f"mlp 4-16-16-1 tanh on the 4 sensors: RMS value error {mlp:.4f}; best linear "
          f"{best} ({lin[best][0]} features) {lin[best][1]:.4f}; ratio {mlp / lin[best][1]:.3f}"
          f"; true values 0..{V.max():.2f}")
    # reference: numpy.linalg.solve of the chain's Bellman equation (chain_values)
    assert mlp <= 0.5 * lin[best][1], (mlp, lin)


def test_ensemble_spread_is_larger_where_data_are_sparse(tmp_path):
    # The same chain, with 19 in 20 of the transitions from levels above 0.75 left out: the
    # data are dense on [0, 0.75] and sparse above.
    # Each transition starts from a uniform level (a plant visited at random times).
    rng = np.random.default_rng(4)
    s = rng.integers(0, S, size=8000)
    sn = np.clip(s + rng.integers(-JUMP, JUMP + 1, size=len(s)), 0, S - 1)
    keep = (LEVEL[s] <= 0.75) | (rng.random(len(s)) < 0.05)
    s, sn = s[keep], sn[keep]
    phi, phin, r = sensors(rng, s), sensors(rng, sn), REWARD[s]
    dense_q = rng.integers(int(0.1 * S), int(0.6 * S), size=300)
    sparse_q = rng.integers(int(0.85 * S), S, size=300)
    Q = np.vstack([sensors(rng, dense_q), sensors(rng, sparse_q)])
    params = dict(NET, members=4, steps_per_obs=1)
    v, sd = run_at("ensemble", DIMS, phi, r, phin, Q, tmp_path, **params)
    assert np.all(np.isfinite(sd)) and np.all(sd >= 0)
    dense, sparse = sd[:300].mean(), sd[300:].mean()
    frac = (LEVEL[s] > 0.75).mean()
    print(f"ensemble of 4 on {keep.sum()} transitions ({100 * frac:.1f}% above level 0.75): "
          f"mean sd {dense:.4f} at levels 0.1..0.6 (dense), {sparse:.4f} at 0.85..1 (sparse), "
          f"ratio {sparse / dense:.2f}")
    # A constant sd would give a ratio of 1.
    assert sparse > 2.0 * dense, (sparse, dense)
