"""Deflated numerical-range certificate (inertia version), petsc4py/slepc4py, any number of ranks.

Claim certified: W has no eigenvalue with Re >= t other than the k found ones (up to the
residual-controlled pseudospectral perturbation), because
  (1) Q (orthonormal, n x k) spans an approximate invariant subspace: W^ Q = Q T + R;
  (2) lambda_max(Q_perp^T S Q_perp) < t with S = (W^ + W^T^)/2, W^ = P^{-1/2} W P^{1/2};
checked by Sylvester/Haynsworth inertia:  #eig(Q_perp^T S Q_perp) > t  =  n_-(tI - S) - n_-(G),
G = Q^T (tI - S)^{-1} Q  (k x k).  n_-(tI - S) from the LDL^T inertia of MUMPS.
"""
import time

import numpy as np
from petsc4py import PETSc


def sym_part(A, p=None):
    """S = (W^ + W^^T)/2 with W^ = D^-1 W D, D = diag(sqrt(p)) (p=None: D = I)."""
    Wh = A.copy()
    if p is not None:
        d = p.copy(); d.sqrtabs()
        di = d.copy(); di.reciprocal()
        Wh.diagonalScale(di, d)
    Wt = Wh.transpose(PETSc.Mat())          # new matrix W^T
    S = Wh.copy()
    S.axpy(1.0, Wt, structure=PETSc.Mat.Structure.SAME_NONZERO_PATTERN)
    S.scale(0.5)
    S.setOption(PETSc.Mat.Option.SYMMETRIC, True)
    return Wh, S


def orthonormal(vecs):
    """CholQR2 of a list of PETSc Vecs -> list of orthonormal Vecs."""
    Q = [v.copy() for v in vecs]
    for _ in range(2):
        k = len(Q)
        G = np.array([[Q[i].dot(Q[j]) for j in range(k)] for i in range(k)])
        Rc = np.linalg.cholesky(G).T          # G = Rc^T Rc
        Ri = np.linalg.inv(Rc)
        new = []
        for j in range(k):
            v = Q[0].duplicate(); v.set(0.0)
            v.maxpy(list(Ri[:j + 1, j]), Q[:j + 1])
            new.append(v)
        Q = new
    return Q


def factor_sym(S, t, opts=None):
    """MUMPS LDL^T of tI - S; returns (ksp, F, seconds)."""
    M = S.copy(); M.scale(-1.0); M.shift(t)
    M.setOption(PETSc.Mat.Option.SYMMETRIC, True)
    ksp = PETSc.KSP().create(comm=S.getComm())
    ksp.setOperators(M); ksp.setType("preonly")
    pc = ksp.getPC(); pc.setType("cholesky"); pc.setFactorSolverType("mumps")
    ksp.setOptionsPrefix("cert_")
    o = PETSc.Options()
    o.setValue("cert_mat_mumps_icntl_24", 1)   # null-pivot detection (required for inertia)
    o.setValue("cert_mat_mumps_icntl_13", 1)   # root node sequential: exact inertia in parallel
    ksp.setFromOptions()
    t0 = time.time()
    ksp.setUp()
    F = pc.getFactorMatrix()
    return ksp, F, M, time.time() - t0


def certify(Wh, S, Qvecs, t, log=print):
    """Returns dict with counts; Qvecs are vectors in the transformed (W^) coordinates."""
    out = {}
    t0 = time.time()
    Q = orthonormal(Qvecs)
    k = len(Q)
    # residual of the invariant subspace: R = W^Q - Q T
    WQ = []
    for q in Q:
        y = q.duplicate(); Wh.mult(q, y); WQ.append(y)
    T = np.array([[Q[i].dot(WQ[j]) for j in range(k)] for i in range(k)])
    rn = []
    for j in range(k):
        r = WQ[j].copy(); r.maxpy(list(-T[:, j]), Q); rn.append(r.norm())
    out["residual_F"] = float(np.sqrt(np.sum(np.square(rn))))
    out["ritz"] = np.linalg.eigvals(T)
    ksp, F, M, tf = factor_sym(S, t)
    out["factor_s"] = tf
    neg, zero, pos = F.getInertia()
    out["inertia_M"] = (neg, zero, pos)
    t1 = time.time()
    if S.getComm().getSize() == 1:      # one block (multi-RHS) solve: 3-4x cheaper per RHS in MUMPS
        n = S.getSize()[0]
        Qa = np.asfortranarray(np.column_stack([q.getArray() for q in Q]))
        Bm = PETSc.Mat().createDense((n, k), array=Qa)
        Xm = PETSc.Mat().createDense((n, k)); Xm.setUp()
        F.matSolve(Bm, Xm)
        G = Qa.T @ Xm.getDenseArray()
    else:
        X = []
        for q in Q:
            x = q.duplicate(); ksp.solve(q, x); X.append(x)
        G = np.array([[Q[i].dot(X[j]) for j in range(k)] for i in range(k)])
    G = 0.5 * (G + G.T)
    eg = np.linalg.eigvalsh(G)
    out["solve_s"] = time.time() - t1
    out["G_eigs"] = eg
    out["neg_G"] = int(np.sum(eg < 0))
    out["above_t_in_complement"] = int(neg - out["neg_G"])
    out["certified"] = bool(zero == 0 and out["above_t_in_complement"] == 0 and out["residual_F"] < 1e-8 * Wh.norm(PETSc.NormType.NORM_1)
                            and np.min(np.abs(eg)) > 1e-8 * np.max(np.abs(eg)))
    out["total_s"] = time.time() - t0
    return out


def real_basis(E, idx, transform=None):
    """Real vectors spanning the eigenvectors idx of a SLEPc EPS (real build): Re and Im."""
    A = E.getOperators()[0]
    out = []
    done = []
    for i in idx:
        vr2, vi2 = A.createVecs()
        lam = E.getEigenpair(i, vr2, vi2)
        if lam.imag != 0 and any(abs(np.conj(lam) - d) < 1e-12 * max(1, abs(lam)) for d in done):
            continue  # conjugate partner: same real span
        done.append(lam)
        out.append(vr2)
        if lam.imag != 0:
            out.append(vi2)
    if transform is not None:
        for v in out:
            v.pointwiseMult(v, transform)
    return out
