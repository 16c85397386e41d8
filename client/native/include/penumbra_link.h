/*
 * penumbra_link.h -- hand 3+1 slices of an evolution to a Penumbra server from C, C++,
 * Fortran (module penumbra_link, fortran/penumbra_link.f90) or MPI codes.
 *
 * The library embeds CPython and calls the Python shim (penumbra_shim, which needs grpcio,
 * protobuf and numpy only). The interpreter is the one named by the environment variable
 * PENUMBRA_PYTHON (a path to a python executable whose site-packages holds penumbra_shim,
 * e.g. a virtual environment's bin/python), else the one baked in at build time
 * (pnl_default_python()). PYTHONPATH is honoured.
 *
 * Units: G = c = 1; lengths, times and masses in units of the run's mass scale M.
 *
 * Status codes: every call returns an int, PNL_OK (0) on success or one of enum pnl_status;
 * pnl_last_error() then gives a message naming the argument or field at fault. Nothing here
 * aborts or exits the caller's process: Python exceptions become status codes.
 *
 * Thread-safety contract:
 *   - Every function may be called from any thread. Python is initialised once, on the first
 *     call that needs it (or pnl_init()); the GIL is then released, and every later call
 *     takes it for its Python part (PyGILState_Ensure/Release) and gives it back before
 *     returning, so the shim's background sender thread runs while the caller computes.
 *   - Calls on one run handle may come from several threads at once (the shim's run handle is
 *     thread-safe), EXCEPT the closing calls: pnl_run_close() and pnl_disconnect() must be the
 *     last call on their handle, made when no other call on it is running (they free it).
 *   - The last-error message is per thread: read it on the thread that got the status.
 *   - If the process already runs Python (e.g. the library is loaded from a Python program),
 *     the library uses that interpreter; a thread holding the GIL may call in (the GIL is
 *     re-entrant via PyGILState_Ensure), other threads wait until the GIL is free.
 *   - Python is never finalised by the library; it lives until the process exits.
 *
 * Timing: pnl_submit() validates, takes one copy of the caller's data (into wire layout) and
 * queues it; a background thread sends it. The caller's buffers may be reused as soon as
 * pnl_submit() returns. Calls with a timeout argument never block longer than it (plus the
 * time to take the GIL).
 */
#ifndef PENUMBRA_LINK_H
#define PENUMBRA_LINK_H

#include <stddef.h>

#ifdef __cplusplus
extern "C" {
#endif

#define PNL_VERSION_MAJOR 0
#define PNL_VERSION_MINOR 1

/* Status codes returned by every call. */
enum pnl_status {
    PNL_OK = 0,
    PNL_INVALID_ARGUMENT = 1,    /* bad argument or field; the message names it */
    PNL_UNAVAILABLE = 2,         /* the server cannot be reached */
    PNL_TIMEOUT = 3,             /* the call's timeout (or the server's deadline) passed */
    PNL_NOT_FOUND = 4,           /* no such run, or nothing yet (no guidance issued so far) */
    PNL_FAILED_PRECONDITION = 5, /* wrong state: run closed, handle closed, ... */
    PNL_RESOURCE_EXHAUSTED = 6,  /* the server refused for lack of room */
    PNL_REFUSED = 7,             /* the server refused a call or a slice for another reason */
    PNL_UNIMPLEMENTED = 8,       /* the installed shim lacks a feature (e.g. multi-rank parts) */
    PNL_PYTHON_ERROR = 9,        /* the embedded interpreter could not start or import the shim */
    PNL_INTERNAL = 10            /* an unexpected error; the message has the Python exception */
};

/* Memory order of a patch's field data. */
enum pnl_memory_order {
    PNL_ORDER_C = 0,       /* u[i][j][k]: k fastest (C arrays) */
    PNL_ORDER_FORTRAN = 1  /* u(i, j, k): i fastest (Fortran arrays) */
};

#define PNL_LABEL_CAPACITY 33 /* body labels: 1-32 of [A-Za-z0-9_-], plus the NUL */
#define PNL_MAX_LEVELS 16     /* refinement levels the server's guidance can describe */
#define PNL_RUN_ID_CAPACITY 64

typedef struct pnl_connection pnl_connection; /* opaque */
typedef struct pnl_run pnl_run;               /* opaque */

/*
 * One patch of the caller's grid: a vertex-centred uniform box. Node [i, j, k] sits at
 * origin + (i dx, j dy, k dz). field_data[f] points to shape[0]*shape[1]*shape[2] doubles in
 * memory_order, for the field named by the f-th entry of field_names. Nothing is copied by
 * the caller; pnl_submit() copies before it returns.
 */
typedef struct pnl_patch {
    const char *field_names;          /* comma-separated, e.g. "gamma_xx,gamma_xy,...,K_zz" */
    int field_count;                  /* entries in field_names and field_data */
    const double *const *field_data;  /* field_count pointers to the caller's arrays */
    int shape[3];                     /* nx, ny, nz: nodes along x, y, z, each >= 2 */
    double spacing[3];                /* dx, dy, dz > 0, M */
    double origin[3];                 /* position of node [0, 0, 0], M */
    int level;                        /* refinement level, 0 coarsest; finest wins in overlaps */
    int memory_order;                 /* PNL_ORDER_C or PNL_ORDER_FORTRAN */
} pnl_patch;

/* Refinement guidance for one body (advisory: the evolution decides). */
typedef struct pnl_body_guidance {
    char label[PNL_LABEL_CAPACITY];
    double centre[3];                 /* where its nested regions are centred, M */
    int finest_level;                 /* levels 1 .. finest_level are recommended */
    int level_count;                  /* entries filled in radii and spacings */
    double radii[PNL_MAX_LEVELS];     /* sphere radius per level (level 1 first), M */
    double spacings[PNL_MAX_LEVELS];  /* grid spacing per level, M */
    double finest_spacing;            /* spacing on the finest level, M */
} pnl_body_guidance;

/* Facts about one guidance issue. */
typedef struct pnl_guidance_info {
    double time;                      /* slice time the guidance was made from, M */
    long long iteration;              /* slice iteration it was made from */
    double valid_from, valid_until;   /* coordinate times it applies to, M */
    int post_merger;                  /* 1 once a common horizon has formed */
    int body_count;                   /* bodies in the guidance (may exceed the capacity given) */
} pnl_guidance_info;

/* The latest state of one tracked surface. Quantities are NaN until it has been found once. */
typedef struct pnl_surface {
    char label[PNL_LABEL_CAPACITY];
    int ever_found;                   /* 1 if a surface has been found at some iteration */
    int latest_attempt_found;         /* 1 if the latest attempt found it */
    long long latest_attempt_iteration; /* -1 before any attempt */
    int consecutive_misses;
    long long found_iteration;        /* iteration of the latest found surface, -1 if none */
    double found_time;                /* its time, M */
    double centroid[3];               /* coordinate centroid, M */
    double area;                      /* proper area, M^2 */
    double irreducible_mass;          /* sqrt(area / 16 pi), M */
    double radius_mean;               /* mean coordinate radius, M */
} pnl_surface;

/* ---- errors ---------------------------------------------------------------------------- */

/* Message of the last failed call on this thread ("" after a successful one). Valid until
 * this thread's next call into the library. */
const char *pnl_last_error(void);
/* Copy the last message into buf (NUL-terminated, truncated to capacity); returns its full
 * length. For Fortran and other callers that want their own buffer. */
int pnl_last_error_copy(char *buf, int capacity);
/* "PNL_OK", "PNL_INVALID_ARGUMENT", ...; "PNL_UNKNOWN_STATUS" for other values. */
const char *pnl_status_name(int status);
/* The python the library uses when PENUMBRA_PYTHON is not set (baked in at build time). */
const char *pnl_default_python(void);

/* ---- life cycle ------------------------------------------------------------------------ */

/* Start the embedded interpreter and import the shim now (otherwise the first call does).
 * Idempotent; a failure is remembered and returned by every later call. */
int pnl_init(void);

/* Connect to the server at target ("host:port"). Waits at most timeout_s seconds (> 0) for
 * the server to answer; UNAVAILABLE or TIMEOUT if it does not (*out is then NULL).
 * timeout_s also becomes the deadline and retry budget of this connection's later unary
 * calls (open, attach, refreshed reads). */
int pnl_connect(const char *target, double timeout_s, pnl_connection **out);

/* Stop the threads of every run handle of this connection (runs stay open on the server) and
 * free it. Run handles made from it must still be freed with pnl_run_close(). */
int pnl_disconnect(pnl_connection *connection);

/* Open a run from a spec string of "key=value" items separated by ';' or newlines:
 *   variable_set=adm | conformal_chi | conformal_w | conformal_phi   (required)
 *   body=LABEL,x,y,z,mass        one per expected body (at least one), M
 *   name=free text               lmax=8  lmax_common=0  tolerance=1e-8  max_iterations=40
 *   queue_depth=4                points_across_horizon=30  nesting_depth=6  steering_interval=4
 *   symmetry=none|bitant         shift_gauge=moving_puncture|other (unset: shift not used)
 *   part_deadline_s=0 (server default)  mass_scale_solar_masses=0  crop_to_windows=0|1
 * Unknown keys and bad values give PNL_INVALID_ARGUMENT naming the key. */
int pnl_open_run(pnl_connection *connection, const char *spec, pnl_run **out);

/* A handle on a run that is already open (e.g. after the evolution restarted). */
int pnl_attach_run(pnl_connection *connection, const char *run_id, pnl_run **out);

/* The run's id (to attach again after a restart), NUL-terminated into buf. */
int pnl_run_id(pnl_run *run, char *buf, int capacity);

/* Send what is queued (up to timeout_s), stop the handle's threads, close the run on the
 * server when close_on_server is 1, and free the handle (always, whatever the status). */
int pnl_run_close(pnl_run *run, int close_on_server, double timeout_s);

/* ---- sending --------------------------------------------------------------------------- */

/* Submit the patches this caller (rank) owns for one iteration. Validates everything first
 * (PNL_INVALID_ARGUMENT naming the field: e.g. "patches[0].shape[2]"), copies the data and
 * returns without waiting on the network. rank in 0 .. nranks-1; with nranks > 1 each rank
 * submits its own part of the slice and the server assembles them. */
int pnl_submit(pnl_run *run, double time, long long iteration, int rank, int nranks,
               const pnl_patch *patches, int patch_count);

/* Wait up to timeout_s until every submitted slice was acknowledged, refused or dropped.
 * PNL_TIMEOUT if some are still pending; PNL_REFUSED (with the server's message) if the
 * server refused a slice since the previous pnl_flush(). */
int pnl_flush(pnl_run *run, double timeout_s);

/* ---- results (read at the regrid step) --------------------------------------------------- */

/* Wait up to timeout_s until every expected body's surface has been attempted on a slice
 * with iteration >= the one given (from the handle's cache; PNL_TIMEOUT otherwise). */
int pnl_wait_surfaces(pnl_run *run, long long iteration, double timeout_s);

/* The latest state of every tracked surface. Writes min(capacity, n) entries into out and n
 * into *count. refresh = 0 reads the handle's cache (no network); 1 asks the server. */
int pnl_latest_surfaces(pnl_run *run, int refresh, pnl_surface *out, int capacity, int *count);

/* The latest refinement guidance: facts into *info, min(capacity, info->body_count) bodies
 * into bodies. PNL_NOT_FOUND before the server has issued any. refresh as above. */
int pnl_latest_guidance(pnl_run *run, int refresh, pnl_guidance_info *info,
                        pnl_body_guidance *bodies, int capacity);

#ifdef __cplusplus
}
#endif

#endif /* PENUMBRA_LINK_H */
