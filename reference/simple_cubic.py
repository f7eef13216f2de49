"""simple-cubic tight binding eps(k) = -2t(cos kx + cos ky + cos kz), t=1.
DOS at the band centre by two independent integrals (mpmath), k-grid sum rules (numpy)."""
import mpmath as mp
import numpy as np

mp.mp.dps = 30
t = mp.mpf(1)

# (a) convolution of the 1D DOS with the 2D (square-lattice) DOS:
#     rho_2D(e) = K(m = 1 - e^2/16) / (2 pi^2)  (mpmath ellipk takes the parameter m = k^2)
#     rho_3D(0) = int_{-2}^{2} rho_1D(x) rho_2D(-x) dx ,  x = 2 sin(theta)
# K(m) = pi / (2 agm(1, sqrt(1-m))) with sqrt(1-m) = |e2|/4 computed directly (no cancellation at m->1)
def K_of_e2(e2):
    # log singularity at e2=0 is integrable; guard exact zeros from rounding near endpoints
    a = max(abs(e2), mp.mpf(10) ** (-3 * mp.mp.dps))
    return mp.pi / (2 * mp.agm(1, a / 4))
rho0_a = mp.quad(lambda th: K_of_e2(2 * mp.sin(th)), [-mp.pi / 2, 0, mp.pi / 2]) / (2 * mp.pi ** 3)
# (b) time-domain formula: rho(E) = (1/pi) int_0^inf cos(E s) J0(2 t s)^3 ds ; at E=0:
rho0_b = mp.quadosc(lambda s: mp.besselj(0, 2 * s) ** 3, [0, mp.inf], omega=2) / mp.pi
print("rho_sc(0) * t  (a) elliptic-K convolution:", mp.nstr(rho0_a, 20))
print("rho_sc(0) * t  (b) int J0^3              :", mp.nstr(rho0_b, 20))
# closed form conjecture check: Gamma-function combination

# van Hove points / other values of the DOS from (a)
def rho(E):
    E = mp.mpf(E)
    def integrand(th):
        x = 2 * mp.sin(th)
        e2 = E - x                      # energy left for the 2D part
        if abs(e2) >= 4:
            return mp.mpf(0)
        return K_of_e2(e2)
    # breakpoints: log singularity at e2 = 0, kinks at |e2| = 4
    pts = {-mp.pi / 2, mp.pi / 2}
    for c in (E / 2, (E - 4) / 2, (E + 4) / 2):
        if -1 < c < 1:
            pts.add(mp.asin(c))
    pts = sorted(pts)
    return mp.quad(integrand, pts) / (2 * mp.pi ** 3)
for E in (0, 1, 2, 3, 5, 6):
    print(f"  rho({E}) = {mp.nstr(rho(E), 15)}")
# normalisation and moments from the DOS (coarse check, slow at high precision -> 15 digits)
mp.mp.dps = 15
norm = 2 * mp.quad(lambda E: rho(E), [0, 2, 6])
m2 = 2 * mp.quad(lambda E: E * E * rho(E), [0, 2, 6])
print("  int rho =", mp.nstr(norm, 12), "  int E^2 rho =", mp.nstr(m2, 12), "(exact 6 t^2)")

# k-grid sum rules: k = 2 pi m / L, m = 0..L-1 in each direction, N = L^3 points
print("\nk-grid (L^3 points, k=2 pi m/L):")
for L in (1, 2, 3, 4, 5, 8, 16):
    k = 2 * np.pi * np.arange(L) / L
    kx, ky, kz = np.meshgrid(k, k, k, indexing="ij")
    e = -2.0 * (np.cos(kx) + np.cos(ky) + np.cos(kz))
    m1, m2, m4 = e.mean(), (e ** 2).mean(), (e ** 4).mean()
    nneg = np.sum(e < -1e-12); nzero = np.sum(np.abs(e) <= 1e-12)
    print(f"  L={L:2d} N={L**3:5d}  <e>={m1: .3e}  <e^2>={m2:.12f}  <e^4>={m4:.12f}  "
          f"min={e.min():.3f} max={e.max():.3f}  #e<0={nneg} #e=0={nzero}")

# irreducible k points of a Gamma-centred L^3 grid under the cubic point group O_h (48 ops:
# permutations of (kx,ky,kz) and sign flips); brute-force orbit counting, weights sum to 1
import itertools
def irreducible(L):
    seen = {}
    for m in itertools.product(range(L), repeat=3):
        orbit = set()
        for perm in itertools.permutations(range(3)):
            for sg in itertools.product((1, -1), repeat=3):
                orbit.add(tuple((sg[i] * m[perm[i]]) % L for i in range(3)))
        key = min(orbit)
        seen[key] = len(orbit)
    return seen
for L in (2, 4, 6, 8, 10, 12):
    irr = irreducible(L)
    formula = (L // 2 + 1) * (L // 2 + 2) * (L // 2 + 3) // 6
    wsum = sum(irr.values())
    # eps-weighted sums over the irreducible set reproduce the full-grid moments
    def ek(m): return -2 * sum(np.cos(2 * np.pi * mi / L) for mi in m)
    m2 = sum(w * ek(k) ** 2 for k, w in irr.items()) / L ** 3
    print(f"  L={L:2d}: N_full={L**3:5d}  N_irr={len(irr):4d}  (L/2+1)(L/2+2)(L/2+3)/6={formula:4d}"
          f"  sum of orbit sizes={wsum}  <e^2>_irr={m2:.12f}")
mp.mp.dps = 20
for E in (1.9, 1.99, 2.01, 2.1):
    print(f"  rho({E}) = {mp.nstr(rho(E), 12)}")

# third moment (odd L breaks particle-hole symmetry of the grid)
for L in (3, 4, 5):
    k = 2 * np.pi * np.arange(L) / L
    kx, ky, kz = np.meshgrid(k, k, k, indexing="ij")
    e = -2.0 * (np.cos(kx) + np.cos(ky) + np.cos(kz))
    print(f"  L={L}: <e^3> = {np.mean(e**3):.12f}")

# local Green function at U=0, half filling (mu=0), beta=10, first Matsubara frequency:
#   G(i w) = -i int_0^inf exp(-w s) J0(2 t s)^3 ds   (w>0)
mp.mp.dps = 30
w0 = mp.pi / 10
Gref = -mp.quad(lambda s: mp.exp(-w0 * s) * mp.besselj(0, 2 * s) ** 3, mp.linspace(0, 500, 1001) + [mp.inf])
print("\nG_loc(i w_0), beta=10, t=1, mu=0 (integral):", mp.nstr(Gref, 20), "j")
for L in (8, 16, 32, 64, 128):
    k = 2 * np.pi * np.arange(L) / L
    c = np.cos(k)
    e = -2.0 * (c[:, None, None] + c[None, :, None] + c[None, None, :])
    g = np.mean(1.0 / (1j * float(w0) - e))
    print(f"  k-sum L={L:3d} (N={L**3}): {g.imag:.15f} j   (Re = {g.real:.1e})")

# optional slow cross-checks:  python simple_cubic.py --extra   (about 1 min)
import sys
if "--extra" in sys.argv:
    # Monte Carlo DOS: fraction of random k with |eps-E| < h/2, divided by h
    rng = np.random.default_rng(0); h = 0.05; Ns = 0; cnt = {0.0: 0, 1.0: 0, 3.0: 0, 5.0: 0}
    for it in range(40):
        kk = rng.uniform(0, np.pi, size=(3, 5_000_000))
        e = -2 * np.cos(kk).sum(axis=0); Ns += e.size
        for E in cnt:
            cnt[E] += np.count_nonzero(np.abs(e - E) < h / 2)
    for E, c_ in cnt.items():
        p_ = c_ / Ns
        print(f"  MC rho({E}) = {p_/h:.5f} +- {np.sqrt(p_/Ns)/h:.5f}")
    # large-L k sums for G_loc(i w_0)
    wf = np.pi / 10
    for L in (192, 256):
        k = 2 * np.pi * np.arange(L) / L; c = np.cos(k)
        exy = -2.0 * (c[:, None] + c[None, :]); acc = 0.0
        for cz in c:
            e = exy - 2.0 * cz
            acc += np.sum(-wf / (wf * wf + e * e))
        print(f"  k-sum L={L}: Im G_loc(i w_0) = {acc / L**3!r}")
