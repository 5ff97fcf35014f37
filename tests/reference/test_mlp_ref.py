"""Reference checks of the value networks (mlp, ensemble) against numpy (tests only).

numpy_mlp below is an independent implementation of what daemon/learn/mlp.c documents: the
seeded generator (xoshiro256** seeded by splitmix64, Lemire's bounded draw), the Glorot start,
the replay ring, the semi-gradient TD loss, backpropagation, gradient-norm clipping, Adam
with the step-size schedule, the target network and the bootstrap masks.  The C driver
(tests/reference/drive.c, $WORTH_DRIVE) runs worthd's estimator on the same transitions; the
weights must agree to 1e-9 relative.  Run with Debian's /usr/bin/python3.
"""
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
