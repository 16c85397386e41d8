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
 * Status codes: every call returns an int of enum pnl_status. The rule for callers:
 *
 *     a call FAILED  if and only if  status != PNL_OK && status != PNL_PENDING
 *
 * (pnl_failed(status), or the macro PNL_FAILED(status), says exactly that). PNL_PENDING is
 * not a failure: the handle or connection made is usable, only the server has not answered
 * yet (see "Never blocking" below). After a failure, and after PNL_PENDING, pnl_last_error()
 * gives a message naming the argument or field at fault, or what is still awaited. Nothing
 * here aborts or exits the caller's process: Python exceptions become status codes.
 *
 * Never blocking the evolution: connecting and opening a run never block past the timeout the
 * caller stated. When the server is unreachable (or slow) the calls return PNL_PENDING with a
 * usable connection or run handle whose background thread keeps trying. A pending run handle
 * takes slices (pnl_submit queues them; beyond the run's queue_depth the oldest waiting slice
 * is dropped, keep newest, and every drop is counted with its reason), reads as "nothing yet"
 * (no surfaces, PNL_NOT_FOUND for guidance), has no run id yet (pnl_run_id: PNL_PENDING and an
 * empty string) and reports its state and counts through pnl_link_stats(). Once the server
 * answers the run opens, the queued slices are sent, and the outage with its dropped slices is
 * recorded on the server. If the server then refuses the run (a bad spec, a missing token), the
 * handle's state becomes PNL_RUN_FAILED and its calls return the refusal. PNL_UNAVAILABLE is
 * kept for what really failed: e.g. pnl_run_close of a run that never opened.
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
 *
 * TLS and tokens: pnl_connect_with() takes them as options (see there). A server with tokens
 * issues a writer token at every opened run; pnl_writer_token() gives it (rank 0 broadcasts it
 * with the run id) and pnl_attach_run_with_token() attaches with it (the other ranks, or the
 * evolution after a restart). Without the token the server refuses sending to or closing the run.
 */
#ifndef PENUMBRA_LINK_H
#define PENUMBRA_LINK_H

#include <stddef.h>

#ifdef __cplusplus
extern "C" {
#endif

#define PNL_VERSION_MAJOR 0
#define PNL_VERSION_MINOR 2

/* Status codes returned by every call. Failure: status != PNL_OK && status != PNL_PENDING. */
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
    PNL_INTERNAL = 10,           /* an unexpected error; the message has the Python exception */
    PNL_PENDING = 11,            /* NOT a failure: usable handle, the server has not answered yet */
    PNL_UNAUTHENTICATED = 12,    /* the server needs a token this call did not send (message: which) */
    PNL_PERMISSION_DENIED = 13   /* the token sent does not grant this call (message: which is needed) */
};

/* 1 if the status is a failure (anything but PNL_OK and PNL_PENDING), else 0. A function, so
 * that PNL_FAILED(pnl_open_run(...)) makes the call once. */
static inline int pnl_failed(int status) { return status != PNL_OK && status != PNL_PENDING; }
#define PNL_FAILED(status) pnl_failed(status)

/* State of a run handle (pnl_link_report.state). */
enum pnl_run_state {
    PNL_RUN_PENDING = 0, /* the server has not answered yet: slices queue, no run id (when opening) */
    PNL_RUN_OPEN = 1,    /* the run is open; slices are sent */
    PNL_RUN_FAILED = 2,  /* the server refused to open or attach after the handle was returned */
    PNL_RUN_CLOSED = 3   /* attached to a run that is closed */
};

/* Memory order of a patch's field data. */
enum pnl_memory_order {
    PNL_ORDER_C = 0,       /* u[i][j][k]: k fastest (C arrays) */
    PNL_ORDER_FORTRAN = 1  /* u(i, j, k): i fastest (Fortran arrays) */
};

#define PNL_LABEL_CAPACITY 33 /* body labels: 1-32 of [A-Za-z0-9_-], plus the NUL */
#define PNL_MAX_LEVELS 16     /* refinement levels the server's guidance can describe */
#define PNL_RUN_ID_CAPACITY 64
#define PNL_WRITER_TOKEN_CAPACITY 128 /* writer tokens are 43 characters today; room to grow */

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

/* The link of one run handle (pnl_link_stats). Counts are of slices (or parts, with nranks > 1)
 * submitted through this handle; submitted = sent + refused + dropped + queued once settled. */
typedef struct pnl_link_report {
    int state;                        /* enum pnl_run_state */
    int link_up;                      /* 1 if the last attempt to reach the server succeeded */
    long long submitted;              /* accepted by pnl_submit */
    long long sent;                   /* acknowledged by the server */
    long long dropped;                /* dropped locally, never received by the server (all reasons) */
    long long refused;                /* refused by the server (pnl_flush reports the message) */
    long long queued;                 /* waiting in the handle's queue or being sent */
    long long dropped_link_down;      /* ... of dropped: the server unreachable (or the run not open yet) */
    long long dropped_queue_full;     /* ... the evolution outpaced the sender while the link was up */
    long long dropped_retry_time_exceeded; /* ... retried too long */
    long long dropped_handle_closed;  /* ... the handle closed before they were sent */
    long long outages;                /* times the link went down (a pending open counts) */
    long long gaps_recorded;          /* outages recorded on the server so far */
} pnl_link_report;

/* ---- errors ---------------------------------------------------------------------------- */

/* Message of the last failed call on this thread, or of the last PNL_PENDING (what is awaited);
 * "" after a PNL_OK. Valid until this thread's next call into the library. */
const char *pnl_last_error(void);
/* Copy the last message into buf (NUL-terminated, truncated to capacity); returns its full
 * length. For Fortran and other callers that want their own buffer. */
int pnl_last_error_copy(char *buf, int capacity);
/* "PNL_OK", "PNL_INVALID_ARGUMENT", ..., "PNL_PENDING", ...; "PNL_UNKNOWN_STATUS" for other values. */
const char *pnl_status_name(int status);
/* The python the library uses when PENUMBRA_PYTHON is not set (baked in at build time). */
const char *pnl_default_python(void);

/* ---- life cycle ------------------------------------------------------------------------ */

/* Start the embedded interpreter and import the shim now (otherwise the first call does).
 * Idempotent; a failure is remembered and returned by every later call. */
int pnl_init(void);

/* Connect to the server at target ("host:port"), plaintext and without a token. Waits at most
 * timeout_s seconds (> 0) for the server to answer: PNL_OK if it did, PNL_PENDING if not (the
 * connection in *out is usable all the same and keeps trying; runs opened on it are pending
 * until the server answers). *out is NULL only after a failure (bad arguments, no Python).
 * timeout_s also becomes the longest pnl_open_run / pnl_attach_run wait, and the deadline and
 * retry budget of this connection's later unary calls (refreshed reads, closing). */
int pnl_connect(const char *target, double timeout_s, pnl_connection **out);

/* pnl_connect with TLS and tokens: options is "key=value" items separated by ';' (or NULL or ""
 * for none; values are trimmed, so paths cannot contain ';'):
 *   token=TOKEN          a reader, opener or admin token, sent with every call
 *   token_file=PATH      the same, read from the file's first line (keeps it off command lines)
 *   tls=1                TLS with the system's root certificates (tls=0: plaintext, the default)
 *   tls_ca=PATH          TLS, trusting the PEM root certificate(s) in PATH (e.g. a self-signed
 *                        server certificate)
 *   tls_cert=PATH, tls_key=PATH   this client's PEM certificate and key, for mutual TLS (both)
 * An unknown key, a key given twice, an unreadable or non-PEM file: PNL_INVALID_ARGUMENT naming
 * the key (a token is never echoed). A TLS handshake that fails (a certificate one side does not
 * accept) cannot be told from an unreachable server: PNL_PENDING, with a message saying so. A
 * missing or refused token shows at the first call it matters to (pnl_open_run:
 * PNL_UNAUTHENTICATED or PNL_PERMISSION_DENIED naming the token the call needs). */
int pnl_connect_with(const char *target, double timeout_s, const char *options, pnl_connection **out);

/* Stop the threads of every run handle of this connection (runs stay open on the server) and
 * free it. Run handles made from it must still be freed with pnl_run_close(). */
int pnl_disconnect(pnl_connection *connection);

/* Open a run from a spec string of "key=value" items separated by ';' or newlines:
 *   variable_set=adm | conformal_chi | conformal_w | conformal_phi   (required)
 *   body=LABEL,x,y,z,mass        one per expected body (at least one), M
 *   name=free text               lmax=8  lmax_common=0  tolerance=1e-8  max_iterations=40
 *   lmax_cap=0 (server default max(24, lmax_common); else 2..32, at least lmax and lmax_common:
 *               the highest degree the finder may raise a surface to on its own)
 *   queue_depth=4                points_across_horizon=30  nesting_depth=6  steering_interval=4
 *   symmetry=none|bitant         shift_gauge=moving_puncture|other (unset: shift not used)
 *   part_deadline_s=0 (server default)  mass_scale_solar_masses=0  crop_to_windows=0|1
 *   formation_forecast=1|0 (forecast when a pair's common horizon forms)
 *   inner_common=1|0 (once the common horizon is found, follow the inner common MOTS too)
 * Unknown keys and bad values give PNL_INVALID_ARGUMENT naming the key.
 * Waits at most the connection's timeout: PNL_OK once the run is open; PNL_PENDING with a usable
 * handle in *out if the server has not answered by then (see "Never blocking" above); the
 * server's refusal if it answered with one (e.g. PNL_INVALID_ARGUMENT, PNL_UNAUTHENTICATED;
 * *out is then NULL). */
int pnl_open_run(pnl_connection *connection, const char *spec, pnl_run **out);

/* A handle on a run that is already open (e.g. after the evolution restarted, or on the other
 * MPI ranks). Waits at most the connection's timeout, as pnl_open_run: PNL_OK, PNL_PENDING (the
 * run id is known; the run's variable set is taken from the submitted fields until the server
 * answers), or the refusal (PNL_NOT_FOUND: no such run). */
int pnl_attach_run(pnl_connection *connection, const char *run_id, pnl_run **out);

/* pnl_attach_run holding the run's writer token (from pnl_writer_token of the handle that opened
 * it), which a server with tokens demands for sending to and closing the run. */
int pnl_attach_run_with_token(pnl_connection *connection, const char *run_id, const char *writer_token,
                              pnl_run **out);

/* The run's id (to attach again after a restart), NUL-terminated into buf. PNL_PENDING and ""
 * while a run being opened is not open yet. capacity PNL_RUN_ID_CAPACITY is always enough. */
int pnl_run_id(pnl_run *run, char *buf, int capacity);

/* The run's writer token, NUL-terminated into buf (capacity PNL_WRITER_TOKEN_CAPACITY is enough):
 * rank 0 broadcasts it with the run id so the other ranks attach with it. PNL_PENDING and ""
 * while the run is not open yet; PNL_NOT_FOUND if the handle holds none (attached without one).
 * A secret: do not print or log it. */
int pnl_writer_token(pnl_run *run, char *buf, int capacity);

/* The state of the handle's link and its counts into *out (never waits on the network; PNL_OK
 * in every state, including pending and failed). Poll it to learn when a pending run opened. */
int pnl_link_stats(pnl_run *run, pnl_link_report *out);

/* Send what is queued (up to timeout_s), stop the handle's threads, close the run on the
 * server when close_on_server is 1, and free the handle (always, whatever the status). A
 * pending handle first waits up to timeout_s for its run to open; if it does not, its queued
 * slices are dropped and the call returns PNL_UNAVAILABLE (the handle is freed all the same). */
int pnl_run_close(pnl_run *run, int close_on_server, double timeout_s);

/* ---- sending --------------------------------------------------------------------------- */

/* Submit the patches this caller (rank) owns for one iteration. Validates everything first
 * (PNL_INVALID_ARGUMENT naming the field: e.g. "patches[0].shape[2]"), copies the data and
 * returns without waiting on the network. rank in 0 .. nranks-1; with nranks > 1 each rank
 * submits its own part of the slice and the server assembles them. PNL_OK also on a pending
 * handle (the slice is queued, or an older one dropped and counted: pnl_link_stats). */
int pnl_submit(pnl_run *run, double time, long long iteration, int rank, int nranks,
               const pnl_patch *patches, int patch_count);

/* Wait up to timeout_s until every submitted slice was acknowledged, refused or dropped.
 * PNL_TIMEOUT if some are still pending (always so on a pending handle with slices queued);
 * PNL_REFUSED (with the server's message) if the server refused a slice since the previous
 * pnl_flush(). */
int pnl_flush(pnl_run *run, double timeout_s);

/* ---- results (read at the regrid step) --------------------------------------------------- */

/* Wait up to timeout_s until every expected body's surface has been attempted on a slice
 * with iteration >= the one given (from the handle's cache; PNL_TIMEOUT otherwise, and on a
 * handle whose run did not open within timeout_s). */
int pnl_wait_surfaces(pnl_run *run, long long iteration, double timeout_s);

/* The latest state of every tracked surface. Writes min(capacity, n) entries into out and n
 * into *count. refresh = 0 reads the handle's cache (no network); 1 asks the server. On a
 * pending handle: PNL_OK with *count 0 (nothing yet; no call is made). */
int pnl_latest_surfaces(pnl_run *run, int refresh, pnl_surface *out, int capacity, int *count);

/* The latest refinement guidance: facts into *info, min(capacity, info->body_count) bodies
 * into bodies. PNL_NOT_FOUND before the server has issued any, and on a pending handle (no
 * call is made). refresh as above. */
int pnl_latest_guidance(pnl_run *run, int refresh, pnl_guidance_info *info,
                        pnl_body_guidance *bodies, int capacity);

#ifdef __cplusplus
}
#endif

#endif /* PENUMBRA_LINK_H */
