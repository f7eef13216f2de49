"""linear mixing, Anderson acceleration (Walker-Ni form), modified Broyden
(Johnson 1988), GMRES equivalence (Walker & Ni 2011), scipy.optimize.anderson.
Fixed-point map g(x) = A x + b, residual f(x) = g(x) - x, x0 = 0,
count K = smallest k with ||f(x_k)||_2 < 1e-10 (number of updates; g is evaluated K+1 times)."""
import json, os
import warnings
import numpy as np
import scipy
import scipy.optimize
import mpmath as mp
warnings.simplefilter("ignore")   # scipy warns about ill-conditioned normal equations when w0=0

TOL = 1e-10
n = 10

def problem_seeded(seed=0):
    rng = np.random.default_rng(seed)
    M = rng.standard_normal((n, n))
    A = 0.9 * M / np.max(np.abs(np.linalg.eigvals(M)))
    b = rng.standard_normal(n)
    return A, b

def problem_tridiag():
    """Closed form, reproducible in any language: symmetric tridiagonal Toeplitz,
    zero diagonal, off-diagonal c = 0.45/cos(pi/11) -> eigenvalues 2c cos(k pi/11), k=1..10,
    spectral radius exactly 0.9;  b_i = i (i = 1..10)."""
    c = 0.45 / np.cos(np.pi / (n + 1))
    A = np.diag(np.full(n - 1, c), 1) + np.diag(np.full(n - 1, c), -1)
    b = np.arange(1, n + 1, dtype=float)
    return A, b

def linear_mixing(A, b, alpha=0.5, kmax=100000, hist=None):
    x = np.zeros(n)
    for k in range(kmax):
        f = A @ x + b - x
        if hist is not None:
            hist.append(np.linalg.norm(f))
        if np.linalg.norm(f) < TOL:
            return k, x
        x = x + alpha * f
    raise RuntimeError

def anderson(A, b, m=n, beta=1.0, kmax=1000, record=False):
    """Walker & Ni (2011) form:  m_k = min(m,k),
       gamma = argmin || f_k - dF gamma ||_2   (lstsq, QR/SVD based),
       x_{k+1} = x_k + beta f_k - (dX + beta dF) gamma."""
    g = lambda x: A @ x + b
    X, F = [], []
    x = np.zeros(n)
    xs = []
    for k in range(kmax):
        fk = g(x) - x
        xs.append(x.copy())
        if np.linalg.norm(fk) < TOL:
            return (k, x, xs) if record else (k, x)
        X.append(x.copy()); F.append(fk.copy())
        X, F = X[-(m + 1):], F[-(m + 1):]
        if len(F) == 1:
            x = x + beta * fk
        else:
            dX = np.diff(np.array(X), axis=0).T
            dF = np.diff(np.array(F), axis=0).T
            gam = np.linalg.lstsq(dF, fk, rcond=None)[0]
            x = x + beta * fk - (dX + beta * dF) @ gam
    raise RuntimeError

def modified_broyden(A, b, alpha=1.0, w0=0.0, wn=1.0, kmax=1000):
    """Johnson, PRB 38, 12807 (1988):
       dF^(i) = (F^(i+1)-F^(i))/|F^(i+1)-F^(i)|, dV^(i) = (V^(i+1)-V^(i))/|F^(i+1)-F^(i)|,
       u^(i)  = alpha dF^(i) + dV^(i)
       a_kl   = w_k w_l <dF^(l)|dF^(k)>,  beta = (w0^2 I + a)^-1,
       c_k    = w_k <dF^(k)|F^(m)>,        gamma_l = sum_k c_k beta_kl
       V^(m+1)= V^(m) + alpha F^(m) - sum_l w_l gamma_l u^(l)
    (V = input vector, F = V_out - V_in = residual).  Unlimited history here."""
    g = lambda x: A @ x + b
    V = np.zeros(n); Fm = g(V) - V
    dFs, us = [], []
    for k in range(kmax):
        if np.linalg.norm(Fm) < TOL:
            return k, V
        if dFs:
            DF = np.array(dFs).T; U = np.array(us).T
            w = np.full(len(dFs), wn)
            a = (w[:, None] * w[None, :]) * (DF.T @ DF)
            bet = np.linalg.inv(w0 ** 2 * np.eye(len(dFs)) + a)
            c = w * (DF.T @ Fm)
            gam = c @ bet
            Vn = V + alpha * Fm - U @ (w * gam)
        else:
            Vn = V + alpha * Fm
        Fn = g(Vn) - Vn
        nrm = np.linalg.norm(Fn - Fm)
        dFs.append((Fn - Fm) / nrm); us.append(alpha * (Fn - Fm) / nrm + (Vn - V) / nrm)
        V, Fm = Vn, Fn
    raise RuntimeError

def gmres_iterates(A, b, kmax=n):
    """Full GMRES on (I-A)x = b, x0 = 0, via Arnoldi (modified Gram-Schmidt)."""
    Mx = np.eye(n) - A
    r0 = b.copy(); bet = np.linalg.norm(r0)
    Q = np.zeros((n, kmax + 1)); H = np.zeros((kmax + 1, kmax))
    Q[:, 0] = r0 / bet
    xs = [np.zeros(n)]
    for j in range(kmax):
        v = Mx @ Q[:, j]
        for i in range(j + 1):
            H[i, j] = Q[:, i] @ v; v = v - H[i, j] * Q[:, i]
        H[j + 1, j] = np.linalg.norm(v)
        if H[j + 1, j] > 1e-14 * bet:
            Q[:, j + 1] = v / H[j + 1, j]
        e1 = np.zeros(j + 2); e1[0] = bet
        y = np.linalg.lstsq(H[:j + 2, :j + 1], e1, rcond=None)[0]
        xs.append(Q[:, :j + 1] @ y)
    return xs

def scipy_anderson(A, b, M=n, alpha=1.0, w0=0.01, line_search=None, sign=+1):
    """scipy solves F(x) = 0 with initial Jacobian guess -1/alpha: first step x1 = x0 + alpha F(x0).
    sign=+1: F(x) = g(x) - x (correct);  sign=-1: F(x) = x - g(x) (first step goes the wrong way)."""
    nf = [0]; nit = [0]
    def F(x):
        nf[0] += 1
        return sign * (A @ x + b - x)
    cb = lambda x, fx: nit.__setitem__(0, nit[0] + 1)
    try:
        x = scipy.optimize.anderson(F, np.zeros(n), M=M, alpha=alpha, w0=w0, f_tol=TOL,
                                    tol_norm=np.linalg.norm, line_search=line_search,
                                    maxiter=5000, callback=cb)
        ok = np.linalg.norm(A @ x + b - x) < TOL
    except scipy.optimize.NoConvergence:
        ok = False
    return nit[0], nf[0], ok

here = os.path.dirname(os.path.abspath(__file__))
print("numpy", np.__version__, "scipy", scipy.__version__)
for name, (A, b) in (("seeded default_rng(0)", problem_seeded(0)), ("tridiagonal closed form", problem_tridiag())):
    print(f"\n=== {name} ===")
    ev = np.linalg.eigvals(A)
    print("  spectral radius =", repr(np.max(np.abs(ev))), "  ||A||_2 =", np.linalg.norm(A, 2))
    xstar = np.linalg.solve(np.eye(n) - A, b)
    if name.startswith("tridiag"):
        mp.mp.dps = 30
        c = mp.mpf("0.45") / mp.cos(mp.pi / (n + 1))
        Mm = mp.matrix(n, n)
        for i in range(n):
            Mm[i, i] = 1
            if i + 1 < n:
                Mm[i, i + 1] = -c; Mm[i + 1, i] = -c
        xs_mp = mp.lu_solve(Mm, mp.matrix([i + 1 for i in range(n)]))
        print("  x* (mpmath 30 digits):", [mp.nstr(v, 16) for v in xs_mp])
    print("  x* =", np.array2string(xstar, precision=15, max_line_width=200))
    print("  ||f(x0)|| = ||b|| =", np.linalg.norm(b))
    print("  max|1-a+a*lambda| (a=0.5) =", np.max(np.abs(0.5 + 0.5 * ev)))
    h = []
    k, x = linear_mixing(A, b, 0.5, hist=h)
    print("  linear mixing alpha=0.5:            K =", k, "  |x-x*| =", np.linalg.norm(x - xstar),
          f"  ||f_(K-1)||={h[-2]:.4e} ||f_K||={h[-1]:.4e}")
    k, x = linear_mixing(A, b, 1.0)
    print("  plain iteration alpha=1:            K =", k)
    k, x, xs_aa = anderson(A, b, m=n, beta=1.0, record=True)
    print("  Anderson m=n=10, beta=1 (lstsq):    K =", k, "  |x-x*| =", np.linalg.norm(x - xstar))
    for m in (0, 1, 2, 3, 5, 9):
        print(f"  Anderson m={m}, beta=1:               K =", anderson(A, b, m=m)[0])
    print("  Anderson m=10, beta=0.5:            K =", anderson(A, b, m=n, beta=0.5)[0])
    print("  modified Broyden w0=0, alpha=1:     K =", modified_broyden(A, b, 1.0, 0.0)[0])
    print("  modified Broyden w0=0.01, alpha=1:  K =", modified_broyden(A, b, 1.0, 0.01)[0])
    # Walker-Ni: x_{j+1}^AA = g(x_j^GMRES); and f(x_{j+1}^AA) = A r_j^GMRES
    xg = gmres_iterates(A, b)
    print("  GMRES residual norms ||b-(I-A)x_j||, j=0..10:")
    print("   ", " ".join(f"{np.linalg.norm(b - (np.eye(n) - A) @ v):.2e}" for v in xg))
    print("  AA residual norms ||f(x_k)||, k=0..K:")
    print("   ", " ".join(f"{np.linalg.norm(A @ v + b - v):.2e}" for v in xs_aa))
    dev = [np.linalg.norm(xs_aa[j + 1] - (A @ xg[j] + b)) for j in range(min(len(xs_aa) - 1, n))]
    print("  max_j |x_{j+1}^AA - g(x_j^GMRES)| =", f"{max(dev):.2e}")
    for sgn, lab in ((+1, "F=g(x)-x"), (-1, "F=x-g(x)")):
        for ls in (None, "armijo"):
            for w0 in (0.0, 0.01):
                it, nf, ok = scipy_anderson(A, b, M=n, alpha=1.0, w0=w0, line_search=ls, sign=sgn)
                print(f"  scipy anderson {lab}, M=10, alpha=1, w0={w0}, line_search={ls}: "
                      f"steps={it}, F evals={nf}, converged={ok}")
    it, nf, ok = scipy_anderson(A, b, M=n, alpha=None, w0=0.01, line_search="armijo")
    print(f"  scipy anderson defaults except M=10,f_tol (alpha auto, w0=0.01, armijo): steps={it}, F evals={nf}, ok={ok}")
    if name.startswith("seeded"):
        with open(os.path.join(here, "mixing_seeded_problem.json"), "w") as fh:
            json.dump({"note": "A, b from numpy default_rng(0): M=standard_normal((10,10)); "
                               "A=0.9*M/max|eig(M)|; b=standard_normal(10); row-major",
                       "A": [[float(v) for v in row] for row in A], "b": [float(v) for v in b],
                       "x_star": [float(v) for v in xstar]}, fh, indent=1)
