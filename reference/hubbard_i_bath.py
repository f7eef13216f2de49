"""Hubbard-I on a hybridization function without a static part, and what the static part
taken at the last Matsubara frequency does to it.  mpmath, 40 digits.

Impurity: one spin-degenerate orbital, level e = eps_loc - mu, Hubbard U, inverse
temperature beta.  Hubbard-I (J. Hubbard, Proc. R. Soc. A 276, 238 (1963)) takes the
Green's function of the isolated atom with the level e + Delta_0, where Delta_0 is the
static part lim Re Delta(iw).  The exact atomic Green's function and self-energy are

    G_at(iw)     = (1 - n)/(iw - e) + n/(iw - e - U),    n = <n_sigma> = P1/2 + P2
    Sigma_at(iw) = iw - e - 1/G_at(iw) = U n + U^2 n (1 - n) / (iw - e - U (1 - n))

(the second line is the first solved for 1/G_at; checked below against the 4x4 exact
diagonalisation of reference/atomic_limit.py's ed_check).

Baths (both have Delta_0 = 0 exactly):
  A  discrete levels: Delta(iw) = sum_b V_b^2/(iw - eps_b)
  B  semicircular (Bethe-lattice) hybridization of half-width D centred at eps0:
     Delta(iw) = t^2 G_sc(iw - eps0), t = D/2, G_sc(z) = (2/D^2)(z - sqrt(z-D) sqrt(z+D))
High-frequency moments Delta = sum_k c_k/(iw)^k: c_k = sum_b V_b^2 eps_b^(k-1) (A), and
c_k = t^2 int rho_sc(e) (e + eps0)^(k-1) de (B); expanding 1/(iw - e) in powers of e/(iw).
"""
import mpmath as mp
import numpy as np

mp.mp.dps = 40

BETA, LEVEL, U = mp.mpf(10), mp.mpf("0.1"), mp.mpf(2)
BATH_A = [(mp.mpf("-0.6"), mp.mpf("0.2")), (mp.mpf("0.8"), mp.mpf("0.5")), (mp.mpf("1.5"), mp.mpf("0.4"))]
D, EPS0 = mp.mpf(1), mp.mpf("0.3")


def w(n):
    return (2 * n + 1) * mp.pi / BETA


def delta_a(n):
    z = mp.mpc(0, w(n))
    return sum(v * v / (z - e) for e, v in BATH_A)


def delta_b(n):
    z = mp.mpc(0, w(n)) - EPS0
    t = D / 2
    return t * t * (2 / D ** 2) * (z - mp.sqrt(z - D) * mp.sqrt(z + D))


def moments_a(k):
    return sum(v * v * e ** (k - 1) for e, v in BATH_A)


def moments_b(k):
    # int rho_sc(e) e^m de = 0 for odd m, (D/2)^m Catalan(m/2) for even m
    t = D / 2
    s = mp.mpf(0)
    for m in range(k):
        if m % 2 == 0:
            cat = mp.binomial(m, m // 2) / (m // 2 + 1)
            s += mp.binomial(k - 1, m) * EPS0 ** (k - 1 - m) * (D / 2) ** m * cat
    return t * t * s


def atom(e):
    weights = [mp.mpf(1), 2 * mp.exp(-BETA * e), mp.exp(-BETA * (2 * e + U))]
    z = sum(weights)
    p = [x / z for x in weights]
    return p, p[1] / 2 + p[2]


def sigma_at(e, n_s, n):
    z = mp.mpc(0, w(n))
    return U * n_s + U * U * n_s * (1 - n_s) / (z - e - U * (1 - n_s))


def g_at(e, n_s, n):
    z = mp.mpc(0, w(n))
    return (1 - n_s) / (z - e) + n_s / (z - e - U)


def ed_sigma(e, n):
    """4x4 exact diagonalisation (numpy, double precision), Lehmann sum for G, then Sigma."""
    cu = np.zeros((4, 4)); cu[0, 1] = 1; cu[2, 3] = 1
    cd = np.zeros((4, 4)); cd[0, 2] = 1; cd[1, 3] = -1
    nu, nd = cu.T @ cu, cd.T @ cd
    H = float(e) * (nu + nd) + float(U) * nu @ nd
    ev, V = np.linalg.eigh(H)
    c = V.T @ cu @ V
    p = np.exp(-float(BETA) * (ev - ev.min())); p /= p.sum()
    z = 1j * float(w(n))
    g = sum((p[a] + p[b]) * abs(c[a, b]) ** 2 / (z - (ev[b] - ev[a])) for a in range(4) for b in range(4))
    return z - float(e) - 1 / g


print(f"beta = {BETA}, level = {LEVEL}, U = {U}")
print("bath A (eps_b, V_b):", [(float(e), float(v)) for e, v in BATH_A])
print(f"bath B: semicircle D = {D}, centre eps0 = {EPS0}")
for name, mom in (("A", moments_a), ("B", moments_b)):
    print(f"moments {name}: c1..c4 =", [mp.nstr(mom(k), 20) for k in range(1, 5)])

p, n_s = atom(LEVEL)
print("\nexact static part Delta_0 = 0, so the Hubbard-I level is the bare level")
print("P0, P1, P2 =", [mp.nstr(x, 20) for x in p])
print("n_sigma =", mp.nstr(n_s, 20), " n_f = 2 n_sigma =", mp.nstr(2 * n_s, 20))
for n in (0, 1, 5, 63, 1023):
    s = sigma_at(LEVEL, n_s, n)
    s2 = mp.mpc(0, w(n)) - LEVEL - 1 / g_at(LEVEL, n_s, n)
    print(f"Sigma_at(iw_{n}) = {mp.nstr(s.real, 18)} {mp.nstr(s.imag, 18)}j"
          f"   |closed form - (iw - e - 1/G_at)| = {mp.nstr(abs(s - s2), 3)}"
          f"   |closed form - ED| = {abs(complex(s) - ed_sigma(LEVEL, n)):.1e}")

print("\nthe static part taken at the last of N frequencies, Re Delta(iw_{N-1}) ~ -c2/w^2,")
print("and the Hubbard-I n_f it gives (relative deviation from the exact n_f):")
for name, d in (("A", delta_a), ("B", delta_b)):
    for N in (16, 32, 64, 1024):
        d0 = d(N - 1).real
        _, n_wrong = atom(LEVEL + d0)
        print(f"  bath {name}, N = {N:5d}: Re Delta(iw_{N-1}) = {mp.nstr(d0, 12):>20s}"
              f"  n_f = {mp.nstr(2 * n_wrong, 12)}  rel. dev. = {mp.nstr((n_wrong - n_s) / n_s, 3)}")
