"""Legendre representation of G(tau) (Boehnke et al., PRB 84, 075145 (2011)).
  G(tau) = sum_l sqrt(2l+1)/beta * P_l(x(tau)) * G_l,   x = 2 tau/beta - 1
  G_l    = sqrt(2l+1) * int_0^beta dtau P_l(x(tau)) G(tau)
  G(iw_n)= sum_l T_nl G_l,  T_nl = (-1)^n i^(l+1) sqrt(2l+1) j_l((2n+1) pi/2)
Free level: closed form (derived here)
  G_l = (-1)^(l+1) * beta * sqrt(2l+1) * i_l(beta*eps/2) / (2 cosh(beta*eps/2))
with i_l the modified spherical Bessel function of the first kind."""
import mpmath as mp
import numpy as np
from scipy.special import spherical_jn, spherical_in, eval_legendre
from scipy.integrate import quad

mp.mp.dps = 40
beta, eps = 10.0, 0.3

def il_mp(l, s):   # modified spherical Bessel i_l(s) = sqrt(pi/(2s)) I_{l+1/2}(s)
    return mp.sqrt(mp.pi / (2 * s)) * mp.besseli(l + mp.mpf(1) / 2, s)

def Gl_exact_mp(l, beta=mp.mpf(10), eps=mp.mpf('0.3')):
    s = beta * eps / 2
    return (-1) ** (l + 1) * beta * mp.sqrt(2 * l + 1) * il_mp(l, s) / (2 * mp.cosh(s))

def Gl_exact(l, beta=beta, eps=eps):
    s = beta * eps / 2
    return (-1) ** (l + 1) * beta * np.sqrt(2 * l + 1) * spherical_in(l, s) / (2 * np.cosh(s))

def G_tau(t, beta=beta, eps=eps):
    return -np.exp(-eps * t) / (1 + np.exp(-beta * eps))

print("G_l, l=0..5 (beta=10, eps=0.3): closed form (mpmath) | quadrature (scipy)")
for l in range(6):
    q = np.sqrt(2 * l + 1) * quad(lambda t: eval_legendre(l, 2 * t / beta - 1) * G_tau(t), 0, beta,
                                  epsabs=1e-13, epsrel=1e-12, limit=200)[0]
    print(f"  l={l}: {mp.nstr(Gl_exact_mp(l), 20):>26s}  quad={q:.16e}")
print("  l=10,20,30:", [mp.nstr(Gl_exact_mp(l), 6) for l in (10, 20, 30)])

def T(n, l):
    return (-1) ** n * (1j) ** (l + 1) * np.sqrt(2 * l + 1) * spherical_jn(l, (2 * n + 1) * np.pi / 2)

def G_iw_from_legendre(n, lmax, beta=beta, eps=eps):
    return sum(T(n, l) * Gl_exact(l, beta, eps) for l in range(lmax + 1))

for (b, e) in ((10.0, 0.3), (100.0, 0.3)):
    print(f"\nReconstruction of G(iw_n), n=0..10, beta={b}, eps={e}: max_n |G_rec-G_exact|")
    for lmax in (10, 20, 30, 50, 80):
        errs = []
        for n in range(11):
            w = (2 * n + 1) * np.pi / b
            errs.append(abs(G_iw_from_legendre(n, lmax, b, e) - 1 / (1j * w - e)))
        print(f"  l = 0..{lmax}: max err = {max(errs):.3e}   (n=0 err {errs[0]:.3e}, n=10 err {errs[10]:.3e})")

# tau reconstruction at tau=0+, beta/2, beta-
print("\nG(tau) reconstruction (beta=10, eps=0.3, l=0..30):")
for t in (0.0, beta / 2, beta):
    x = 2 * t / beta - 1
    g = sum(np.sqrt(2 * l + 1) / beta * eval_legendre(l, x) * Gl_exact(l) for l in range(31))
    print(f"  tau={t}: {g:.16f}  exact {G_tau(t):.16f}")

# High-frequency tail from G_l:
#  c1 = -(2/beta)   sum_{l even} sqrt(2l+1) G_l
#  c2 = +(2/beta^2) sum_{l odd}  sqrt(2l+1) l(l+1) G_l
#  c3 = -(1/beta^3) sum_{l even} sqrt(2l+1) (l+2)!/(l-2)! G_l
L = range(0, 40)
Gl = [Gl_exact_mp(l) for l in L]
c1 = -2 / mp.mpf(10) * sum(mp.sqrt(2 * l + 1) * Gl[l] for l in L if l % 2 == 0)
c2 = 2 / mp.mpf(10) ** 2 * sum(mp.sqrt(2 * l + 1) * l * (l + 1) * Gl[l] for l in L if l % 2 == 1)
c3 = -1 / mp.mpf(10) ** 3 * sum(mp.sqrt(2 * l + 1) * mp.factorial(l + 2) / mp.factorial(l - 2) * Gl[l]
                                for l in L if l % 2 == 0 and l >= 2)
print("\nTail from G_l: c1 =", mp.nstr(c1, 20), " c2 =", mp.nstr(c2, 20), " c3 =", mp.nstr(c3, 20))
# the WRONG parity choice (odd l for c1) gives:
c1_wrong = -2 / mp.mpf(10) * sum(mp.sqrt(2 * l + 1) * Gl[l] for l in L if l % 2 == 1)
print("  (odd-l sum for c1 would give", mp.nstr(c1_wrong, 12), ")")
# particle-hole symmetric case eps=0: odd G_l vanish
print("eps=0: G_l l=0..3 =", [float(Gl_exact(l, 10.0, 0.0)) if l else -10 / 2 for l in range(4)])

# Spherical Bessel check values: scipy vs mpmath (30 digits)
print("\nj_l(x): scipy.special.spherical_jn vs mpmath")
for l in (0, 1, 2, 5, 10):
    for k, x in (("pi/2", mp.pi / 2), ("3pi/2", 3 * mp.pi / 2), ("21pi/2", 21 * mp.pi / 2)):
        ref = mp.sqrt(mp.pi / (2 * x)) * mp.besselj(l + mp.mpf(1) / 2, x)
        sc = spherical_jn(l, float(x))
        xf = mp.mpf(float(x))  # the double nearest to x: separates argument rounding from library error
        ref_f = mp.sqrt(mp.pi / (2 * xf)) * mp.besselj(l + mp.mpf(1) / 2, xf)
        print(f"  j_{l}({k:6s}) = {mp.nstr(ref, 18):>26s}   scipy={sc: .17e}  relerr={abs(sc-float(ref))/abs(float(ref)):.1e}"
              f"  relerr_vs_exact_at_double_arg={abs(sc-float(ref_f))/abs(float(ref_f)):.1e}")
print("closed forms at pi/2: j0=2/pi=", mp.nstr(2 / mp.pi, 18), " j1=4/pi^2=", mp.nstr(4 / mp.pi ** 2, 18),
      " j2=24/pi^3-2/pi=", mp.nstr(24 / mp.pi ** 3 - 2 / mp.pi, 18))
print("handbook-style points (A&S Table 10.1-like): j_l(1), j_l(5)")
for l in (0, 1, 2):
    for x in (1, 5):
        ref = mp.sqrt(mp.pi / (2 * x)) * mp.besselj(l + mp.mpf(1) / 2, x)
        print(f"  j_{l}({x}) = {mp.nstr(ref, 15)}")
# orthogonality of T: sum_n T_nl conj(T_nl') / ... (unitarity-type check) is NOT simple; instead
# check T_nl against direct quadrature of int_0^beta e^{iw_n tau} sqrt(2l+1)/beta P_l(x) dtau
print("\nT_nl vs quadrature (beta=10):")
for n, l in ((0, 0), (0, 1), (3, 2), (-2, 3), (10, 5)):
    w = (2 * n + 1) * np.pi / beta
    f = lambda t: np.sqrt(2 * l + 1) / beta * eval_legendre(l, 2 * t / beta - 1)
    re = quad(lambda t: np.cos(w * t) * f(t), 0, beta, limit=400)[0]
    im = quad(lambda t: np.sin(w * t) * f(t), 0, beta, limit=400)[0]
    print(f"  n={n:3d} l={l}: T={complex(T(n,l)):.15f}  quad={re:.15f}{im:+.15f}j")

# T_nl to 20 digits (mpmath); note T_{-n-1,l} = conj(T_{n,l})
def T_mp(n, l):
    a = (2 * n + 1) * mp.pi / 2
    jl = mp.sqrt(mp.pi / (2 * abs(a))) * mp.besselj(l + mp.mpf(1) / 2, abs(a)) * (1 if a > 0 else (-1) ** l)
    return (-1) ** n * mp.mpc(0, 1) ** (l + 1) * mp.sqrt(2 * l + 1) * jl
print("\nT_nl (mpmath):")
for n, l in ((0, 0), (0, 1), (3, 2), (-2, 3), (1, 3), (10, 5)):
    t = T_mp(n, l)
    print(f"  T[{n},{l}] = {mp.nstr(t.real, 18)} {mp.nstr(t.imag, 18)}j")
