"""Own simulator for designs C (3-choice renewal) and D (terminal exit). numpy only."""
import numpy as np
import pandas as pd

GAMMA = 0.5772156649015329

def lse(v, axis=-1):
    m = v.max(axis=axis, keepdims=True)
    return (m + np.log(np.exp(v - m).sum(axis=axis, keepdims=True))).squeeze(axis)

# ---------------- Design C ----------------
C = dict(nw=20, beta=0.95, rep_drop=5, wscale=4.0,
         theta=dict(theta_w=-0.6, theta_wb=-0.6, theta_P=-4.2, theta_R=-5.0))

def c_units(rng, n):
    b = (rng.random(n) < 0.4).astype(float)
    X = rng.normal(size=(n, 10))
    return b, X

def c_incprobs(X):
    """per-unit increment pmf over {0,1,2,3}; nonlinear in x0..x2."""
    s = 0.8 * np.tanh(X[:, 0]) + 0.5 * X[:, 1] ** 2 - 0.5 + 0.6 * (X[:, 2] > 0.5)
    a = np.stack([np.zeros_like(s), 0.8 + s, 0.2 + 1.5 * s, -1.0 + 1.8 * s], 1)
    a = a - a.max(1, keepdims=True)
    p = np.exp(a)
    return p / p.sum(1, keepdims=True)

def c_transitions(X, d=C):
    """F[u, j, w, w'] per unit, j=0 keep,1 repair,2 replace."""
    nw = d['nw']; n = X.shape[0]
    pinc = c_incprobs(X)
    F = np.zeros((n, 3, nw, nw))
    for w in range(nw):
        starts = [w, max(w - d['rep_drop'], 0), 0]
        for j, s0 in enumerate(starts):
            for k in range(pinc.shape[1]):
                F[:, j, w, min(s0 + k, nw - 1)] += pinc[:, k]
    return F

def c_flow(b, th, d=C):
    nw = d['nw']; w = np.arange(nw) / d['wscale']
    u = np.zeros((b.size, 3, nw))
    u[:, 0, :] = th['theta_w'] * w[None] + th['theta_wb'] * w[None] * b[:, None]
    u[:, 1, :] = th['theta_P']
    u[:, 2, :] = th['theta_R']
    return u

def c_solve(b, X, th=None, d=C, tol=1e-12):
    th = th or d['theta']
    F = c_transitions(X, d); u = c_flow(b, th, d); beta = d['beta']
    V = np.zeros((b.size, d['nw']))
    for it in range(100000):
        v = u + beta * np.einsum('ujwk,uk->ujw', F, V)
        Vn = lse(v, axis=1) + GAMMA
        diff = np.abs(Vn - V).max(); V = Vn
        if diff < tol:
            break
    v = u + beta * np.einsum('ujwk,uk->ujw', F, V)
    P = np.exp(v - lse(v, axis=1)[:, None, :])
    # Hotz-Miller identity with anchor R=replace (j=2)
    hm = np.abs(V - (v[:, 2, :] - np.log(P[:, 2, :]) + GAMMA)).max()
    # renewal finite dependence check: w_j = u_j-u_R + beta(E[h|j]-E[h|R]) with h=u_R - ln P_R
    h = u[:, 2, :] - np.log(P[:, 2, :])
    Eh = np.einsum('ujwk,uk->ujw', F, h)
    wfd = (u - u[:, 2:3, :]) + beta * (Eh - Eh[:, 2:3, :])
    fd = np.abs(wfd - (v - v[:, 2:3, :])).max()
    return dict(V=V, v=v, P=P, F=F, iters=it, hm_err=hm, fd_err=fd, bellman_diff=diff)

def c_simulate(seed, n=1000, T=12, burn=15, d=C, th=None):
    rng = np.random.default_rng(seed)
    b, X = c_units(rng, n)
    sol = c_solve(b, X, th, d)
    P, F = sol['P'], sol['F']
    w = rng.integers(0, 6, size=n)
    rows = []
    idx = np.arange(n)
    for t in range(burn + T):
        p = P[idx, :, w]                      # n x 3
        a = (rng.random(n)[:, None] > np.cumsum(p, 1)).sum(1)
        a = np.minimum(a, 2)
        if t >= burn:
            rows.append(pd.DataFrame({'machine': idx, 'period': t - burn, 'wear': w,
                                      'action': np.array(['keep', 'repair', 'replace'])[a]}))
        fr = F[idx, a, w]                     # n x nw
        w = (rng.random(n)[:, None] > np.cumsum(fr, 1)).sum(1)
        w = np.minimum(w, d['nw'] - 1)
    df = pd.concat(rows, ignore_index=True)
    df['w'] = df['wear'] / d['wscale']
    df['b'] = b[df['machine']]
    df['w_b'] = df['w'] * df['b']
    for k in range(10):
        df[f'x{k}'] = X[df['machine'], k]
    df['machine'] = 'm' + df['machine'].astype(str)
    return df.sort_values(['machine', 'period']).reset_index(drop=True), sol

C_SPEC = """# Design C truth: {truth}
[data]
unit = "machine"
period = "period"
choice = "action"
states = ["w", "b", {xs}]
path = "{path}"

[model]
kind = "renewal"
anchor = "replace"
discount = 0.95
persistent = ["b", {xs}]

[utility.keep]
theta_w = "w"
theta_wb = "w_b"

[utility.repair]
theta_P = "1"

[utility.replace]
theta_R = "1"
"""

# ---------------- Design D ----------------
D = dict(nd=12, beta=0.9, dscale=4.0, cvals=np.array([0.5, 1.0, 1.5]),
         Pc=np.array([[0.8, 0.15, 0.05], [0.15, 0.7, 0.15], [0.05, 0.15, 0.8]]),
         theta=dict(theta_d=1.0, theta_c=-1.0, theta_0=-0.2))

def d_units(rng, n):
    return rng.normal(size=(n, 15))

def d_moveprobs(X):
    """per-firm pmf of demand step {-1,0,+1}; nonlinear in x0..x2."""
    s = 0.7 * np.sin(1.5 * X[:, 0]) + 0.4 * (X[:, 1] ** 2 - 1) - 0.5 * np.abs(X[:, 2]) + 0.4
    a = np.stack([-s, np.full_like(s, 0.3), s], 1)
    p = np.exp(a - a.max(1, keepdims=True))
    return p / p.sum(1, keepdims=True)

def d_transitions(X, d=D):
    nd = d['nd']; n = X.shape[0]
    pm = d_moveprobs(X)
    Fd = np.zeros((n, nd, nd))
    for k in range(nd):
        for m, step in enumerate([-1, 0, 1]):
            Fd[:, k, min(max(k + step, 0), nd - 1)] += pm[:, m]
    # joint state s = k*3 + c ; F[u, s, s'] = Fd[k,k'] * Pc[c,c']
    F = np.einsum('ukl,cd->ukcld', Fd, d['Pc']).reshape(n, nd * 3, nd * 3)
    return F

def d_states(d=D):
    k, c = np.meshgrid(np.arange(d['nd']), np.arange(3), indexing='ij')
    return k.ravel(), c.ravel()

def d_solve(X, th=None, d=D, tol=1e-12):
    th = th or d['theta']
    F = d_transitions(X, d); beta = d['beta']
    k, c = d_states(d)
    ustay = th['theta_d'] * k / d['dscale'] + th['theta_c'] * d['cvals'][c] + th['theta_0']
    ustay = np.broadcast_to(ustay, (X.shape[0], ustay.size))
    V = np.zeros_like(ustay)
    for it in range(100000):
        vs = ustay + beta * np.einsum('usr,ur->us', F, V)
        Vn = np.logaddexp(vs, 0.0) + GAMMA
        diff = np.abs(Vn - V).max(); V = Vn
        if diff < tol:
            break
    vs = ustay + beta * np.einsum('usr,ur->us', F, V)
    Pexit = 1 / (1 + np.exp(vs))
    hm = np.abs(V - (0.0 - np.log(Pexit) + GAMMA)).max()
    # terminal finite dependence: w_stay = u_stay - u_exit + beta E[u_exit - ln P_exit + gamma]
    wfd = ustay + beta * np.einsum('usr,ur->us', F, -np.log(Pexit) + GAMMA)
    fd = np.abs(wfd - vs).max()
    return dict(V=V, vs=vs, Pexit=Pexit, F=F, iters=it, hm_err=hm, fd_err=fd, bellman_diff=diff)

def d_simulate(seed, n=1500, T=10, d=D, th=None):
    rng = np.random.default_rng(seed)
    X = d_units(rng, n)
    sol = d_solve(X, th, d)
    P, F = sol['Pexit'], sol['F']
    k = rng.integers(3, 9, size=n)
    c = rng.choice(3, size=n, p=[0.3, 0.4, 0.3])
    s = k * 3 + c
    alive = np.ones(n, bool)
    rows = []
    for t in range(T):
        idx = np.flatnonzero(alive)
        ss = s[idx]
        ex = rng.random(idx.size) < P[idx, ss]
        rows.append(pd.DataFrame({'firm': idx, 'year': t, 'dlev': ss // 3, 'clev': ss % 3,
                                  'action': np.where(ex, 'exit', 'stay')}))
        alive[idx[ex]] = False
        stay = idx[~ex]
        fr = F[stay, s[stay]]
        s[stay] = np.minimum((rng.random(stay.size)[:, None] > np.cumsum(fr, 1)).sum(1), F.shape[1] - 1)
    df = pd.concat(rows, ignore_index=True)
    df['d'] = df['dlev'] / d['dscale']
    df['c'] = d['cvals'][df['clev']]
    for j in range(15):
        df[f'z{j}'] = X[df['firm'], j]
    df['firm'] = 'f' + df['firm'].astype(str)
    return df.sort_values(['firm', 'year']).reset_index(drop=True), sol

D_SPEC = """# Design D truth: {truth}
[data]
unit = "firm"
period = "year"
choice = "action"
states = ["d", "c", {zs}]
path = "{path}"

[model]
kind = "terminal"
anchor = "exit"
discount = 0.9

[utility.stay]
theta_d = "d"
theta_c = "c"
theta_0 = "1"

[utility.exit]
"""
