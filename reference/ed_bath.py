"""Single-orbital Anderson impurity with a discrete bath of 1-3 levels, by exact
diagonalisation (numpy, double precision).

H = eps (n_up + n_dn) + U n_up n_dn + sum_{b,s} eps_b a+_{bs} a_{bs}
    + sum_{b,s} V_b (c+_s a_{bs} + a+_{bs} c_s),
so that Delta(iw) = sum_b V_b^2 / (iw - eps_b).  Fock space of 2(1+nb) modes with
Jordan-Wigner signs; full diagonalisation, energies shifted by the ground state before
exponentiating.  Per case: the spin-up impurity G(tau) on a grid and as bin averages, the
Legendre coefficients G_l = sqrt(2l+1) int_0^beta P_l(2tau/beta-1) G(tau) dtau (Boehnke et al.,
PRB 84, 075145 (2011)) by 400-point Gauss-Legendre quadrature of the Lehmann sum,
G(iw_n) from the Lehmann sum, <n_sigma>, <n_up n_dn> and P(0), P(1), P(2) of the impurity.
Usage: python ed_bath.py  (writes output/ed_bath.json and prints a summary)."""
import json
import os

import numpy as np
from numpy.polynomial.legendre import leggauss
from scipy.special import eval_legendre, spherical_jn

CASES = [
    # name, beta, U, eps, bath [(eps_b, V_b)]
    ("u0_half_two_levels", 10.0, 0.0, 0.0, [(-0.5, 0.4), (0.5, 0.4)]),
    ("half_one_level", 10.0, 2.0, -1.0, [(0.0, 0.5)]),
    ("away_three_levels", 10.0, 4.0, -0.5, [(-1.0, 0.3), (0.2, 0.5), (1.0, 0.4)]),
    ("large_u_half", 20.0, 8.0, -4.0, [(0.0, 0.3)]),
    ("low_filling_two_levels", 5.0, 1.0, 0.3, [(-0.4, 0.5), (0.8, 0.3)]),
    ("half_two_levels_beta20", 20.0, 3.0, -1.5, [(-0.6, 0.5), (0.6, 0.5)]),
]
N_L = 30
N_BINS = 20
N_TAU = 21
N_IW = 10


def operators(n_modes):
    """Annihilators of n_modes fermionic modes (Jordan-Wigner, mode 0 leftmost)."""
    dim = 2 ** n_modes
    ops = []
    for m in range(n_modes):
        c = np.zeros((dim, dim))
        for state in range(dim):
            if (state >> m) & 1:
                sign = (-1) ** bin(state & ((1 << m) - 1)).count("1")
                c[state ^ (1 << m), state] = sign
        ops.append(c)
    return ops


def solve(beta, U, eps, bath):
    nb = len(bath)
    n_modes = 2 * (1 + nb)
    ops = operators(n_modes)
    # modes: 0 = c_up, 1 = c_dn, 2+2b = a_{b,up}, 3+2b = a_{b,dn}
    num = [o.T @ o for o in ops]
    H = eps * (num[0] + num[1]) + U * num[0] @ num[1]
    for b, (eb, vb) in enumerate(bath):
        for s in range(2):
            a = ops[2 + 2 * b + s]
            c = ops[s]
            H = H + eb * num[2 + 2 * b + s] + vb * (c.T @ a + a.T @ c)
    E, S = np.linalg.eigh(H)
    E = E - E.min()
    w = np.exp(-beta * E)
    Z = w.sum()

    def expval(op):
        d = np.einsum("ij,ik,kj->j", S, op, S)
        return float((w * d).sum() / Z)

    n_up, n_dn = expval(num[0]), expval(num[1])
    docc = expval(num[0] @ num[1])
    one = np.eye(2 ** n_modes)
    p0 = expval((one - num[0]) @ (one - num[1]))
    p2 = docc
    p1 = expval(num[0] @ (one - num[1]) + num[1] @ (one - num[0]))
    cm = S.T @ ops[0] @ S  # <m|c_up|n>
    A = cm ** 2  # |<m|c|n>|^2, rows m, columns n

    def gtau(tau):
        tau = np.atleast_1d(tau)
        # -(1/Z) sum_mn exp(-(beta-tau)E_m - tau E_n) |<m|c|n>|^2
        em = np.exp(-np.outer(beta - tau, E))  # (t, m)
        en = np.exp(-np.outer(tau, E))  # (t, n)
        return -np.einsum("tm,mn,tn->t", em, A, en) / Z

    x, wq = leggauss(400)
    tq = beta * (x + 1) / 2
    gq = gtau(tq)
    gl = [float(np.sqrt(2 * l + 1) * np.sum(wq * beta / 2 * eval_legendre(l, x) * gq)) for l in range(N_L)]
    # bin averages on N_BINS bins of [0, beta): 40-point Gauss-Legendre per bin
    xb, wb = leggauss(40)
    h = beta / N_BINS
    bins = []
    for i in range(N_BINS):
        t = i * h + h * (xb + 1) / 2
        bins.append(float(np.sum(wb / 2 * gtau(t))))
    taus = np.linspace(0, beta, N_TAU)
    taus[0], taus[-1] = 1e-12 * beta, beta * (1 - 1e-12)
    gpts = [float(v) for v in gtau(taus)]
    # G(iw_n) = (1/Z) sum_mn |<m|c|n>|^2 (e^{-beta E_m} + e^{-beta E_n}) / (iw + E_m - E_n)
    giw = []
    dE = E[:, None] - E[None, :]
    wsum = w[:, None] + w[None, :]
    for n in range(N_IW):
        iw = 1j * (2 * n + 1) * np.pi / beta
        g = np.sum(A * wsum / (iw + dE)) / Z
        giw.append([float(g.real), float(g.imag)])
    return dict(n_up=n_up, n_dn=n_dn, docc=docc, p=[p0, p1, p2], gl=gl, gtau_bins=bins,
                gtau_points=dict(tau=[float(t) for t in np.linspace(0, beta, N_TAU)], g=gpts),
                giw=giw)


def t_nl(n, l):
    """T_nl = (-1)^n i^(l+1) sqrt(2l+1) j_l((2n+1)pi/2) (Boehnke et al. 2011)."""
    return (-1) ** n * 1j ** (l + 1) * np.sqrt(2 * l + 1) * spherical_jn(l, (2 * n + 1) * np.pi / 2)


def self_checks(r, beta, U, eps, bath):
    """Consistency of the reference itself: G(iw_n) from G_l against the Lehmann sum, the
    jump G(0+) + G(beta-) = -1, the tail c1 = -(2/beta) sum_even sqrt(2l+1) G_l = 1, and at
    U = 0 G(iw) = 1/(iw - eps - Delta(iw))."""
    gl = np.array(r["gl"])
    dev_iw = 0.0
    dev_u0 = 0.0
    for n, (re, im) in enumerate(r["giw"]):
        g_leg = sum(t_nl(n, l) * gl[l] for l in range(len(gl)))
        dev_iw = max(dev_iw, abs(g_leg - (re + 1j * im)))
        if U == 0.0:
            iw = 1j * (2 * n + 1) * np.pi / beta
            delta = sum(v * v / (iw - e) for e, v in bath)
            dev_u0 = max(dev_u0, abs(1 / (iw - eps - delta) - (re + 1j * im)))
    g = r["gtau_points"]["g"]
    jump = g[0] + g[-1] + 1.0
    c1 = -2.0 / beta * sum(np.sqrt(2 * l + 1) * gl[l] for l in range(0, len(gl), 2))
    return dict(legendre_vs_lehmann=float(dev_iw), jump=float(jump), c1_minus_1=float(c1 - 1.0),
                u0_vs_dyson=float(dev_u0))


def main():
    out = []
    for name, beta, U, eps, bath in CASES:
        r = solve(beta, U, eps, bath)
        r.update(name=name, beta=beta, u=U, eps=eps, bath=[list(b) for b in bath])
        out.append(r)
        print(f"{name}: beta={beta} U={U} eps={eps} bath={bath}")
        print(f"  n_sigma={r['n_up']:.15f} docc={r['docc']:.15e} "
              f"P=({r['p'][0]:.15f}, {r['p'][1]:.15f}, {r['p'][2]:.15f})")
        print("  G_l[0:4] = " + ", ".join(f"{v:.15f}" for v in r["gl"][:4]))
        print(f"  G(0+)={r['gtau_points']['g'][0]:.15f} G(beta/2)={r['gtau_points']['g'][N_TAU // 2]:.15f}")
        chk = self_checks(r, beta, U, eps, bath)
        print("  self-checks: " + ", ".join(f"{k}={v:.1e}" for k, v in chk.items()))
    here = os.path.dirname(os.path.abspath(__file__))
    os.makedirs(os.path.join(here, "output"), exist_ok=True)
    path = os.path.join(here, "output", "ed_bath.json")
    tmp = path + ".tmp"
    with open(tmp, "w") as f:
        json.dump(dict(source="reference/ed_bath.py (exact diagonalisation, numpy)",
                       n_legendre=N_L, n_bins=N_BINS, cases=out), f, indent=1)
    os.replace(tmp, path)
    print(f"wrote {path}")


if __name__ == "__main__":
    main()
