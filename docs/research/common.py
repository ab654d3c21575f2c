import os
import resource

os.environ["GAPLINE_PROGRESS"] = "off"
import numpy as np

from pipeline.backends.scipy_ import ScipyBackend
from pipeline.models.lattice import LatticeWalk


def model(L):
    return LatticeWalk((L, L), ("periodic", "periodic"), (1.0, 0.8), (0.6, 0.8))

def build(L):
    op = ScipyBackend().assemble(model(L))
    return op.handle["W"].tocsr()

def exact(L, k=13):
    return np.asarray(model(L).exact().slowest_eigenvalues(k))[:k]

def all_exact_near(L, count):
    """Full exact spectrum sorted by Re desc (first `count`)."""
    th = 2*np.pi*np.arange(L)/L
    r0 = 1.0*(np.exp(-1j*th)-1) + 0.6*(np.exp(1j*th)-1)
    r1 = 0.8*(np.exp(-1j*th)-1) + 0.8*(np.exp(1j*th)-1)
    lam = (r0[:, None] + r1[None, :]).ravel()
    o = np.argsort(-lam.real, kind="stable")
    return lam[o[:count]]

def full_exact(L):
    th = 2*np.pi*np.arange(L)/L
    r0 = 1.0*(np.exp(-1j*th)-1) + 0.6*(np.exp(1j*th)-1)
    r1 = 0.8*(np.exp(-1j*th)-1) + 0.8*(np.exp(1j*th)-1)
    return (r0[:, None] + r1[None, :]).ravel()

def match(found, ex, tol=None):
    """How many of the exact values `ex` (with multiplicity) are matched by `found`."""
    found = list(np.asarray(found, complex))
    if tol is None:
        tol = 1e-4 * abs(ex[1].real) if len(ex) > 1 else 1e-10
    n = 0
    for e in ex:
        if not found: break
        d = np.abs(np.array(found) - e)
        j = int(np.argmin(d))
        if d[j] < tol:
            n += 1; found.pop(j)
    return n

def rss_gb():
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20

def petsc_mat(L, comm=None, shift=0.0):
    """Distributed PETSc AIJ of W - shift*I from the model's row blocks (no scipy backend)."""
    from petsc4py import PETSc
    comm = comm or PETSc.COMM_WORLD
    m = model(L); n = m.n_states
    A = PETSc.Mat().create(comm=comm)
    A.setSizes([n, n]); A.setType(PETSc.Mat.Type.AIJ)
    A.setUp()
    rs, re_ = A.getOwnershipRange()
    b = m.row_block(rs, re_)
    import scipy.sparse as sp
    sub = sp.csr_matrix((b.data, b.indices, b.indptr), shape=(re_ - rs, n))
    sub.sort_indices()
    if shift:
        sub = (sub - sp.eye(re_ - rs, n, k=rs) * shift).tocsr(); sub.sort_indices()
    A.setPreallocationCSR((sub.indptr.astype(PETSc.IntType), sub.indices.astype(PETSc.IntType), sub.data))
    A.assemble()
    return A
