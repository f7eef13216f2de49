"""atomic limit of the single-orbital Anderson impurity,
H = eps*(n_up+n_dn) + U n_up n_dn  (mu absorbed in eps), exact diagonalisation in the
4-state Fock space versus closed forms.  mpmath, 40 digits."""
import mpmath as mp
import numpy as np

mp.mp.dps = 40

def atomic(beta, U, eps):
    beta, U, eps = mp.mpf(beta), mp.mpf(U), mp.mpf(eps)
    E = {"0": mp.mpf(0), "up": eps, "dn": eps, "2": 2 * eps + U}
    w = {k: mp.exp(-beta * v) for k, v in E.items()}
    Z = sum(w.values())
    P0, P1, P2 = w["0"] / Z, (w["up"] + w["dn"]) / Z, w["2"] / Z
    n_s = P1 / 2 + P2                      # <n_sigma>
    d = P2                                 # <n_up n_dn>
    Etot = (E["up"] * w["up"] + E["dn"] * w["dn"] + E["2"] * w["2"]) / Z
    def G_tau(t):                          # closed form, 0<t<beta
        return -(mp.exp(-eps * t) + mp.exp(-beta * eps) * mp.exp(-(eps + U) * t)) / Z
    def G_iw(n):
        wn = (2 * n + 1) * mp.pi / beta
        z = mp.mpc(0, wn)
        return (1 - n_s) / (z - eps) + n_s / (z - eps - U)
    return dict(Z=Z, P0=P0, P1=P1, P2=P2, n_s=n_s, d=d, E=Etot, G_tau=G_tau, G_iw=G_iw,
                beta=beta, U=U, eps=eps)

def ed_check(beta, U, eps, n=0, tau=None):
    """Brute-force check with explicit 4x4 matrices (numpy, double precision):
    Lehmann sum for G(iw_n) and G(tau)."""
    # basis |n_up n_dn>: 0=|00>,1=|10>,2=|01>,3=|11>; c_up with Jordan-Wigner sign (up first)
    cu = np.zeros((4, 4)); cu[0, 1] = 1; cu[2, 3] = 1
    cd = np.zeros((4, 4)); cd[0, 2] = 1; cd[1, 3] = -1
    nu, nd = cu.T @ cu, cd.T @ cd
    H = eps * (nu + nd) + U * nu @ nd
    Ev, V = np.linalg.eigh(H)
    c = V.T @ cu @ V
    p = np.exp(-beta * (Ev - Ev.min())); Z = p.sum(); p /= Z
    wn = (2 * n + 1) * np.pi / beta
    g = sum((p[a] + p[b]) * abs(c[a, b]) ** 2 / (1j * wn - (Ev[b] - Ev[a]))
            for a in range(4) for b in range(4))
    out = {"G_iw": g}
    if tau is not None:
        gt = -sum(p[a] * np.exp(tau * (Ev[a] - Ev[b])) * abs(c[a, b]) ** 2
                  for a in range(4) for b in range(4))
        out["G_tau"] = gt
    out["docc"] = float(np.sum(p * np.diag(V.T @ (nu @ nd) @ V)))
    return out

for (beta, U, eps) in ((20, 4, -2), (10, 3, -0.5)):
    r = atomic(beta, U, eps)
    print(f"\n=== beta={beta}, U={U}, eps={eps} ===")
    for k in ("Z", "P0", "P1", "P2", "n_s", "d", "E"):
        print(f"  {k:4s} = {mp.nstr(r[k], 20)}")
    print("  n_total = 2<n_s> =", mp.nstr(2 * r["n_s"], 20))
    print("  local moment <(n_up-n_dn)^2> = P1 =", mp.nstr(r["P1"], 20))
    for t in (0, r["beta"] / 4, r["beta"] / 2, r["beta"]):
        print(f"  G(tau={mp.nstr(t,6)}) = {mp.nstr(r['G_tau'](t), 20)}")
    print("  G(0+)+G(beta-) =", mp.nstr(r["G_tau"](0) + r["G_tau"](r["beta"]), 20))
    for n in (0, 1, 5):
        g = r["G_iw"](n)
        print(f"  G(iw_{n}) = {mp.nstr(g.real, 18)} {mp.nstr(g.imag, 18)}j")
    e = ed_check(float(beta), float(U), float(eps), n=0, tau=float(beta) / 2)
    print("  ED check: G(iw_0) =", e["G_iw"], " G(beta/2) =", e["G_tau"], " docc =", e["docc"])
    # Fourier consistency: G(iw_0) = int_0^beta e^{iw tau} G(tau)
    w0 = mp.pi / r["beta"]
    gi = mp.quad(lambda t: mp.exp(1j * w0 * t) * r["G_tau"](t), [0, r["beta"] / 2, r["beta"]])
    print("  Fourier check |int - G(iw_0)| =", mp.nstr(abs(gi - r["G_iw"](0)), 5))

# half filling closed forms (eps=-U/2): G(iw) = -i w / (w^2 + U^2/4) ; G(beta/2) = -1/(2 cosh(beta U/4))
b, U = mp.mpf(20), mp.mpf(4)
print("\nhalf filling: -1/(2cosh(beta U/4)) =", mp.nstr(-1 / (2 * mp.cosh(b * U / 4)), 20))
print("              P0=P2=1/(2(1+e^{beta U/2})) =", mp.nstr(1 / (2 * (1 + mp.exp(b * U / 2))), 20))
w0 = mp.pi / b
print("              G(iw_0) = -i w0/(w0^2+U^2/4) =", mp.nstr(-w0 / (w0 ** 2 + U ** 2 / 4), 20), "j")

# U=0, eps=0: P(0)=P(2)=1/4, P(1)=1/2 at any beta; and U=0 generic eps: P2 = n_s^2
for beta in (1, 10, 100):
    r = atomic(beta, 0, 0)
    print(f"U=0, eps=0, beta={beta}: P0,P1,P2 =", [mp.nstr(r[k], 15) for k in ("P0", "P1", "P2")])
r = atomic(10, 0, 0.3)
print("U=0, eps=0.3, beta=10: P2 - n_s^2 =", mp.nstr(r["P2"] - r["n_s"] ** 2, 5),
      " P0-(1-n_s)^2 =", mp.nstr(r["P0"] - (1 - r["n_s"]) ** 2, 5))

# Legendre coefficients of the atomic-limit G(tau): superposition of two free levels
#   G_l = (1-<n>) G_l^free(eps) + <n> G_l^free(eps+U),
#   G_l^free(e) = (-1)^(l+1) beta sqrt(2l+1) i_l(beta e/2) / (2 cosh(beta e/2))   (see legendre.py)
def Gl_free(l, beta, e):
    s = beta * e / 2
    a = abs(s)   # i_l(-s) = (-1)^l i_l(s); avoid the complex branch of sqrt(pi/(2s)) for s<0
    il = mp.sqrt(mp.pi / (2 * a)) * mp.besseli(l + mp.mpf(1) / 2, a) if a != 0 else (1 if l == 0 else 0)
    il *= (-1) ** l if s < 0 else 1
    return (-1) ** (l + 1) * beta * mp.sqrt(2 * l + 1) * il / (2 * mp.cosh(s))
for (beta, U, eps) in ((20, 4, -2), (10, 3, -0.5)):
    r = atomic(beta, U, eps)
    Gl = [(1 - r["n_s"]) * Gl_free(l, r["beta"], r["eps"]) + r["n_s"] * Gl_free(l, r["beta"], r["eps"] + r["U"])
          for l in range(6)]
    # cross-check l=0..3 by quadrature of the closed-form G(tau)
    q = [mp.sqrt(2 * l + 1) * mp.quad(lambda t: mp.legendre(l, 2 * t / r["beta"] - 1) * r["G_tau"](t),
                                      [0, r["beta"] / 2, r["beta"]]) for l in range(4)]
    print(f"beta={beta},U={U},eps={eps}: G_l l=0..5 =", [mp.nstr(g, 15) for g in Gl])
    print("   quadrature l=0..3       =", [mp.nstr(g, 15) for g in q])
