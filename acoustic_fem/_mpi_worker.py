"""MPI worker of the distributed eigensolver (run as a script, one process per rank).

Started by :mod:`acoustic_fem._distributed_eigen` as

    mpirun -n N PYTHON .../acoustic_fem/_mpi_worker.py WORKDIR

with a Python that has petsc4py, slepc4py and mpi4py (Debian's
``/usr/bin/python3`` with python3-slepc4py-real, or any interpreter on a
cluster).  It needs only numpy and those three packages: it never imports
acoustic_fem (whose dependencies that interpreter may lack).

WORKDIR holds the problem, written by the launcher:

* ``K_indptr.npy``, ``K_indices.npy``, ``K_data.npy`` and the same for ``M``:
  the (n, n) CSR arrays of K and M (both triangles);
* ``job.json``: ``nev`` (eigenpairs wanted), ``sigma`` (the shift, below the
  lowest eigenvalue), ``tol``, ``max_it``, ``factor`` ("cholesky" or "lu").

Each rank memory-maps the arrays and copies only its own rows (PETSc's
default contiguous row split), so no rank holds the whole matrices.  K x =
λ M x is solved by SLEPc's Krylov–Schur on the shift-and-invert transform
(K - σM)⁻¹M, the factorisation by MUMPS (PC factor solver type).  Results:

* ``lam.npy`` (m,) the converged eigenvalues nearest σ (ascending);
* ``X.npy`` (n, m) the eigenvectors, rows written by their owning rank;
* ``done.json``: iteration count, converged count, timings, each rank's peak
  resident memory, the solver names.
"""

import json
import os
import sys
import time

# Run as a script, the package folder would come first on sys.path; drop it so
# that no module of ours can shadow one of the libraries below.
_here = os.path.dirname(os.path.abspath(__file__))
if sys.path and os.path.abspath(sys.path[0] or os.getcwd()) == _here:
    del sys.path[0]

import numpy as np  # noqa: E402


def _split(n, size, rank):
    """PETSc's default contiguous ownership: the first n % size ranks get one more row."""
    base, extra = divmod(n, size)
    start = rank * base + min(rank, extra)
    return start, start + base + (1 if rank < extra else 0)


def _local_matrix(PETSc, comm, workdir, name, start, stop, n):
    ip = np.load(os.path.join(workdir, f"{name}_indptr.npy"), mmap_mode="r")
    ind = np.load(os.path.join(workdir, f"{name}_indices.npy"), mmap_mode="r")
    dat = np.load(os.path.join(workdir, f"{name}_data.npy"), mmap_mode="r")
    a, b = int(ip[start]), int(ip[stop])
    it = PETSc.IntType
    loc_ip = (np.asarray(ip[start:stop + 1]) - a).astype(it)
    loc_ind = np.asarray(ind[a:b]).astype(it)
    loc_dat = np.asarray(dat[a:b], dtype=PETSc.ScalarType)
    A = PETSc.Mat().createAIJ(size=((stop - start, n), (stop - start, n)),
                              csr=(loc_ip, loc_ind, loc_dat), comm=comm)
    A.setOption(PETSc.Mat.Option.SYMMETRIC, True)
    A.assemble()
    return A


def main(workdir):
    t0 = time.perf_counter()
    import petsc4py

    petsc4py.init([])
    import slepc4py

    slepc4py.init([])
    from petsc4py import PETSc
    from slepc4py import SLEPc

    comm = PETSc.COMM_WORLD
    rank, size = comm.getRank(), comm.getSize()
    with open(os.path.join(workdir, "job.json")) as fh:
        job = json.load(fh)
    n = int(job["n"])
    start, stop = _split(n, size, rank)
    K = _local_matrix(PETSc, comm, workdir, "K", start, stop, n)
    M = _local_matrix(PETSc, comm, workdir, "M", start, stop, n)
    assert K.getOwnershipRange() == (start, stop)
    t_load = time.perf_counter() - t0

    eps = SLEPc.EPS().create(comm)
    eps.setOperators(K, M)
    eps.setProblemType(SLEPc.EPS.ProblemType.GHEP)
    eps.setType(SLEPc.EPS.Type.KRYLOVSCHUR)
    nev = int(job["nev"])
    ncv = int(job.get("ncv") or 0) or PETSc.DECIDE
    eps.setDimensions(nev=nev, ncv=ncv)
    eps.setWhichEigenpairs(SLEPc.EPS.Which.TARGET_MAGNITUDE)
    sigma = float(job["sigma"])
    eps.setTarget(sigma)
    eps.setTolerances(tol=float(job["tol"]), max_it=int(job["max_it"]))
    st = eps.getST()
    st.setType(SLEPc.ST.Type.SINVERT)
    st.setShift(sigma)
    ksp = st.getKSP()
    ksp.setType(PETSc.KSP.Type.PREONLY)
    pc = ksp.getPC()
    pc.setType(PETSc.PC.Type.CHOLESKY if job["factor"] == "cholesky" else PETSc.PC.Type.LU)
    pc.setFactorSolverType(job.get("solver_type", "mumps"))
    # a deterministic start vector: the same run gives the same modes
    v0 = K.createVecRight()
    v0.setArray(np.cos(0.7 + 1.3 * np.arange(start, stop, dtype=float)) + 1.5)
    eps.setInitialSpace([v0])
    eps.setFromOptions()  # PETSc/SLEPc options from the command line or PETSC_OPTIONS
    t1 = time.perf_counter()
    eps.solve()
    t_solve = time.perf_counter() - t1

    m = eps.getConverged()
    lam = np.array([eps.getEigenvalue(i).real for i in range(m)])
    order = np.argsort(lam, kind="stable")
    xpath = os.path.join(workdir, "X.npy")
    if rank == 0:
        X = np.lib.format.open_memmap(xpath, mode="w+", dtype=float, shape=(n, m))
        del X
    comm.tompi4py().Barrier()
    X = np.load(xpath, mmap_mode="r+")
    vr = K.createVecRight()
    for j, i in enumerate(order):
        eps.getEigenvector(int(i), vr)
        X[start:stop, j] = vr.getArray()
    X.flush()
    del X
    import resource

    peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # Linux: KiB
    peaks = comm.tompi4py().gather(peak_mb, root=0)  # also a barrier before lam/done
    if rank == 0:
        np.save(os.path.join(workdir, "lam.npy"), lam[order])
        with open(os.path.join(workdir, "done.json"), "w") as fh:
            json.dump(dict(converged=int(m), iterations=int(eps.getIterationNumber()),
                           ranks=int(size), load_seconds=t_load, solve_seconds=t_solve,
                           rank_peak_rss_mb=peaks,
                           eps_type=eps.getType(), st_type=st.getType(),
                           pc_type=pc.getType(), factor_solver=pc.getFactorSolverType(),
                           petsc=".".join(map(str, PETSc.Sys.getVersion())),
                           slepc=".".join(map(str, SLEPc.Sys.getVersion()))), fh)


if __name__ == "__main__":
    main(sys.argv[1])
