/* A flat C layer over sequential MUMPS (complex double, zmumps) for ctypes.
 *
 * acoustic_fem factorises complex *symmetric* (not Hermitian) sparse
 * matrices Q = K + iσC - σ²M in its damped-mode solver.  SciPy has no sparse
 * LDLᵀ for them (SuperLU's LU is ~50x slower than a Cholesky of the same
 * pattern on 3D meshes) and CHOLMOD handles Hermitian matrices only; MUMPS
 * (an open-source multifrontal solver, https://mumps-solver.org) does
 * LDLᵀ with 2x2 pivoting for SYM = 2 in complex arithmetic.  Its C interface
 * is a large struct whose layout only the C compiler knows, hence this file:
 * a handle, factorise, solve (many right-hand sides at once), query, free.
 *
 * Built by setup.py as an optional extension against Debian's
 * libmumps-seq-dev (headers /usr/include, /usr/include/mumps_seq; library
 * zmumps_seq); acoustic_fem/_zsym.py loads it with ctypes and falls back to
 * its other paths when it is absent.  Indices passed in are 1-based (MUMPS's
 * convention); the matrix is given as one triangle (either) in coordinates.
 */
#include <stdint.h>
#include <stdlib.h>
#include <string.h>
#include "zmumps_c.h"

#define JOB_INIT -1
#define JOB_END -2
#define USE_COMM_WORLD -987654
#define ICNTL(I) icntl[(I)-1]
#define INFOG(I) infog[(I)-1]

/* PyInit stub: lets setuptools build this as an extension module; the file
   is loaded with ctypes, never imported. */
void *PyInit__zsym_c(void) { return NULL; }

typedef struct {
    ZMUMPS_STRUC_C id;
    int factored;
} zsym_handle;

static void quiet(ZMUMPS_STRUC_C *id) {
    id->ICNTL(1) = -1; /* error messages off: errors come back in INFOG */
    id->ICNTL(2) = -1;
    id->ICNTL(3) = -1;
    id->ICNTL(4) = 0;
}

/* New handle; sym = 2 (general symmetric, LDLᵀ) or 0 (unsymmetric LU).
   Returns NULL on failure, *err = INFOG(1). */
void *zsym_new(int sym, int *err) {
    zsym_handle *h = (zsym_handle *)calloc(1, sizeof(zsym_handle));
    if (!h) { *err = -13; return NULL; }
    h->id.comm_fortran = USE_COMM_WORLD;
    h->id.par = 1;
    h->id.sym = sym;
    h->id.job = JOB_INIT;
    zmumps_c(&h->id);
    *err = h->id.INFOG(1);
    if (*err < 0) { free(h); return NULL; }
    quiet(&h->id);
    return h;
}

/* Analyse + factorise.  irn, jcn: 1-based int32 coordinates (nnz of them);
   a: nnz complex values (interleaved re, im).  ordering: MUMPS ICNTL(7)
   (7 = automatic, 5 = METIS, 3 = SCOTCH, 0 = AMD, ...); relax: ICNTL(14)
   (% extra workspace); perm: NULL, or MUMPS's PERM_IN (perm[i-1] = 1-based
   position of unknown i in the pivot order), then used instead of ordering.
   The arrays must stay alive until zsym_free: MUMPS keeps pointers.  Returns INFOG(1) (0 = success, < 0 error, > 0 warning). */
int zsym_factor(void *hp, int n, int64_t nnz, int *irn, int *jcn, double *a,
                int ordering, int relax, int *perm) {
    zsym_handle *h = (zsym_handle *)hp;
    ZMUMPS_STRUC_C *id = &h->id;
    id->n = n;
    id->nnz = nnz;
    id->irn = irn;
    id->jcn = jcn;
    id->a = (ZMUMPS_COMPLEX *)a;
    id->ICNTL(5) = 0;          /* assembled format */
    id->ICNTL(7) = ordering;
    if (perm) {                /* a fill-reducing order given by the caller */
        id->perm_in = perm;
        id->ICNTL(7) = 1;
    }
    id->ICNTL(14) = relax;
    id->ICNTL(18) = 0;         /* centralised matrix */
    id->ICNTL(24) = 0;         /* no null-pivot detection: Q(σ) is regular */
    id->job = 4;               /* analysis + factorisation */
    zmumps_c(id);
    if (id->INFOG(1) == -9 || id->INFOG(1) == -8) {
        /* workspace too small: retry once with twice the relaxation */
        id->ICNTL(14) = 2 * (relax > 20 ? relax : 20) + 20;
        id->job = 2;
        zmumps_c(id);
    }
    h->factored = id->INFOG(1) >= 0;
    return id->INFOG(1);
}

/* Solve in place: rhs holds nrhs columns of n complex numbers (column-major,
   interleaved re, im) and is overwritten by the solution. */
int zsym_solve(void *hp, int nrhs, double *rhs) {
    zsym_handle *h = (zsym_handle *)hp;
    ZMUMPS_STRUC_C *id = &h->id;
    if (!h->factored) return -1000;
    id->ICNTL(20) = 0;         /* dense right-hand side */
    id->ICNTL(21) = 0;         /* centralised solution */
    id->nrhs = nrhs;
    id->lrhs = id->n;
    id->rhs = (ZMUMPS_COMPLEX *)rhs;
    id->job = 3;
    zmumps_c(id);
    return id->INFOG(1);
}

/* Copy INFOG(1..80) into infog and RINFOG(1..40) into rinfog. */
void zsym_info(void *hp, int *infog, double *rinfog) {
    zsym_handle *h = (zsym_handle *)hp;
    memcpy(infog, h->id.infog, 80 * sizeof(int));
    memcpy(rinfog, h->id.rinfog, 40 * sizeof(double));
}

void zsym_free(void *hp) {
    zsym_handle *h = (zsym_handle *)hp;
    if (!h) return;
    h->id.job = JOB_END;
    zmumps_c(&h->id);
    free(h);
}
