/*
 * pnl_link_probe: the link of libpenumbra_link as an evolution code meets it: a server that is
 * not there (pending handles), one that comes up later, and one with TLS and tokens. Prints one
 * line per call, "case=NAME status=PNL_... elapsed_s=SECONDS message=TEXT", and "key=value"
 * lines for the test (tests/native/test_native_link.py) to check. Exit status 0 means the
 * program ran to its end; a deadline passed while polling is exit status 3, loudly.
 *
 *   pnl_link_probe unreachable HOST:PORT SECONDS        nobody serves HOST:PORT
 *   pnl_link_probe pending-then-open HOST:PORT SECONDS  the server comes up after "waiting_for_server"
 *   pnl_link_probe secure-open HOST:PORT OPTIONS        open, submit, print run id and writer token
 *   pnl_link_probe secure-attach HOST:PORT OPTIONS RUN_ID WRITER_TOKEN   attach with it, submit, close
 *   pnl_link_probe secure-refusals HOST:PORT OPTIONS RUN_ID   OPTIONS without a token: what is refused
 */
#define _POSIX_C_SOURCE 200809L
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "penumbra_link.h"

#define N 33
#define FIELDS 12
#define DEADLINE_S 300.0 /* generous: polling loops fail loudly after it */

static double now_s(void)
{
    struct timespec t;
    clock_gettime(CLOCK_MONOTONIC, &t);
    return t.tv_sec + 1e-9 * t.tv_nsec;
}

static int report(const char *name, int status, double elapsed_s)
{
    printf("case=%s status=%s elapsed_s=%.3f message=%s\n", name, pnl_status_name(status), elapsed_s,
           pnl_last_error());
    fflush(stdout);
    return status;
}

/* Report a call with the wall time it took (the call first, then the clock). */
#define TIMED(name, call)                                                                                    \
    do {                                                                                                     \
        double t0_ = now_s();                                                                                \
        int status_ = (call);                                                                                \
        report((name), status_, now_s() - t0_);                                                              \
    } while (0)

static void print_link(const char *name, pnl_run *run)
{
    pnl_link_report r;
    int status = pnl_link_stats(run, &r);
    printf("link=%s status=%s state=%d link_up=%d submitted=%lld sent=%lld dropped=%lld refused=%lld queued=%lld "
           "dropped_link_down=%lld dropped_queue_full=%lld outages=%lld gaps_recorded=%lld\n",
           name, pnl_status_name(status), r.state, r.link_up, r.submitted, r.sent, r.dropped, r.refused, r.queued,
           r.dropped_link_down, r.dropped_queue_full, r.outages, r.gaps_recorded);
    fflush(stdout);
}

static const char names[] = "gamma_xx,gamma_xy,gamma_xz,gamma_yy,gamma_yz,gamma_zz,K_xx,K_xy,K_xz,K_yy,K_yz,K_zz";
static double psi4[N * N * N], zero[N * N * N];
static const double *data[FIELDS];
static const double centre[3] = {0.013, -0.021, 0.017}; /* never on a node */

/* Time-symmetric data of one puncture of mass 1 at centre: gamma_ij = psi^4 delta_ij, K_ij = 0,
 * psi = 1 + 1 / (2 r); its horizon is the sphere r = 1/2 (G = c = 1, lengths in M). */
static pnl_patch puncture_patch(void)
{
    const double h = 0.05; /* 10 nodes across the horizon radius */
    for (int i = 0; i < N; ++i)
        for (int j = 0; j < N; ++j)
            for (int k = 0; k < N; ++k) {
                double x = (i - (N - 1) / 2) * h - centre[0], y = (j - (N - 1) / 2) * h - centre[1],
                       z = (k - (N - 1) / 2) * h - centre[2];
                double psi = 1.0 + 0.5 / sqrt(x * x + y * y + z * z);
                psi4[(i * N + j) * N + k] = psi * psi * psi * psi;
            }
    for (int f = 0; f < FIELDS; ++f)
        data[f] = (f == 0 || f == 3 || f == 5) ? psi4 : zero;
    pnl_patch p = {.field_names = names, .field_count = FIELDS, .field_data = data, .shape = {N, N, N},
                   .spacing = {h, h, h}, .level = 0, .memory_order = PNL_ORDER_C};
    for (int d = 0; d < 3; ++d) /* nodes at multiples of h: the puncture is off every node */
        p.origin[d] = -(N - 1) / 2 * h;
    return p;
}

static const char spec[] = "variable_set=adm; name=link probe; lmax=4; queue_depth=2; body=A,0.013,-0.021,0.017,1.0";

static int submit(const char *name, pnl_run *run, long long iteration)
{
    pnl_patch p = puncture_patch();
    double started = now_s();
    int status = pnl_submit(run, 0.1 * iteration, iteration, 0, 1, &p, 1);
    return report(name, status, now_s() - started);
}

/* Nobody serves target: every call returns within its timeout, the handles are usable. */
static int unreachable(const char *target, double timeout_s)
{
    pnl_connection *connection = NULL;
    pnl_run *run = NULL, *attached = NULL;
    report("init", pnl_init(), 0);
    TIMED("connect", pnl_connect(target, timeout_s, &connection));
    printf("connection_is_null=%d\n", connection == NULL);
    if (connection == NULL)
        return 0;
    TIMED("open_run", pnl_open_run(connection, spec, &run));
    printf("run_is_null=%d\n", run == NULL);
    if (run == NULL)
        return 0;
    char text[PNL_WRITER_TOKEN_CAPACITY] = "unchanged";
    report("run_id", pnl_run_id(run, text, sizeof text), 0);
    printf("run_id=[%s]\n", text);
    report("writer_token", pnl_writer_token(run, text, sizeof text), 0);
    printf("writer_token=[%s]\n", text);
    print_link("fresh", run);
    for (long long it = 0; it < 4; ++it) {
        char name[32];
        snprintf(name, sizeof name, "submit_%lld", it);
        submit(name, run, it);
    }
    print_link("after_submits", run);
    pnl_guidance_info info;
    pnl_body_guidance bodies[1];
    report("guidance", pnl_latest_guidance(run, 1, &info, bodies, 1), 0);
    pnl_surface surfaces[1];
    int count = -1;
    report("surfaces", pnl_latest_surfaces(run, 1, surfaces, 1, &count), 0);
    printf("surface_count=%d\n", count);
    TIMED("flush", pnl_flush(run, 0.5));
    TIMED("wait_surfaces", pnl_wait_surfaces(run, 0, 0.5));
    TIMED("attach_run", pnl_attach_run(connection, "run-0123456789ab", &attached));
    if (attached != NULL) {
        submit("attached_submit", attached, 7);
        report("attached_run_id", pnl_run_id(attached, text, sizeof text), 0);
        printf("attached_run_id=[%s]\n", text);
        print_link("attached", attached);
        TIMED("attached_close", pnl_run_close(attached, 1, 0.5));
    }
    TIMED("run_close", pnl_run_close(run, 1, 0.5));
    report("disconnect", pnl_disconnect(connection), 0);
    return 0;
}

/* Poll the handle's link until the run is open (what an evolution does at its regrid step). */
static int wait_open(pnl_run *run)
{
    double give_up = now_s() + DEADLINE_S;
    pnl_link_report r;
    while (pnl_link_stats(run, &r) == PNL_OK && r.state == PNL_RUN_PENDING) {
        if (now_s() > give_up) {
            printf("FAILED: the run did not open within %g s of the server's start\n", DEADLINE_S);
            fflush(stdout);
            return 3;
        }
        nanosleep(&(struct timespec){.tv_nsec = 50000000}, NULL);
    }
    return r.state == PNL_RUN_OPEN ? 0 : 3;
}

/* Pending at first; the test starts the server on target after "waiting_for_server". */
static int pending_then_open(const char *target, double timeout_s)
{
    pnl_connection *connection = NULL;
    pnl_run *run = NULL;
    report("connect", pnl_connect(target, timeout_s, &connection), 0);
    if (connection == NULL)
        return 0;
    TIMED("open_run", pnl_open_run(connection, spec, &run));
    if (run == NULL)
        return 0;
    for (long long it = 0; it < 4; ++it)
        submit("pending_submit", run, it);
    print_link("pending", run);
    printf("waiting_for_server\n");
    fflush(stdout);
    int failed = wait_open(run);
    print_link("opened", run);
    if (failed)
        return failed;
    /* Let the queued slices go before the next ones, so that keep-newest drops none of them. */
    report("flush_queued", pnl_flush(run, DEADLINE_S), 0);
    for (long long it = 10; it < 12; ++it)
        submit("open_submit", run, it);
    report("flush", pnl_flush(run, DEADLINE_S), 0);
    report("wait_surfaces", pnl_wait_surfaces(run, 11, DEADLINE_S), 0);
    pnl_surface s;
    int count = 0;
    report("surfaces", pnl_latest_surfaces(run, 1, &s, 1, &count), 0);
    printf("surface count=%d label=%s found_iteration=%lld irreducible_mass=%.6f\n", count, s.label,
           s.found_iteration, s.irreducible_mass);
    char run_id[PNL_RUN_ID_CAPACITY];
    report("run_id", pnl_run_id(run, run_id, sizeof run_id), 0);
    printf("run_id=%s\n", run_id);
    print_link("final", run);
    report("run_close", pnl_run_close(run, 1, DEADLINE_S), 0);
    report("disconnect", pnl_disconnect(connection), 0);
    return 0;
}

/* Rank 0 with TLS and an opener token: open, submit, hand over the run id and writer token. */
static int secure_open(const char *target, const char *options)
{
    pnl_connection *connection = NULL;
    pnl_run *run = NULL;
    if (report("connect", pnl_connect_with(target, 60.0, options, &connection), 0) != PNL_OK ||
        report("open_run", pnl_open_run(connection, spec, &run), 0) != PNL_OK)
        return 0;
    submit("submit", run, 0);
    report("flush", pnl_flush(run, DEADLINE_S), 0);
    char run_id[PNL_RUN_ID_CAPACITY], token[PNL_WRITER_TOKEN_CAPACITY];
    report("run_id", pnl_run_id(run, run_id, sizeof run_id), 0);
    report("writer_token", pnl_writer_token(run, token, sizeof token), 0);
    /* A stand-in for MPI_Bcast: the test hands both to the next process. */
    printf("run_id=%s\nwriter_token=%s\n", run_id, token);
    report("run_close", pnl_run_close(run, 0, DEADLINE_S), 0); /* the run stays open for the other rank */
    report("disconnect", pnl_disconnect(connection), 0);
    return 0;
}

/* Another rank: TLS without a token of its own, attaching with the run's writer token. */
static int secure_attach(const char *target, const char *options, const char *run_id, const char *token)
{
    pnl_connection *connection = NULL;
    pnl_run *run = NULL;
    if (report("connect", pnl_connect_with(target, 60.0, options, &connection), 0) != PNL_OK ||
        report("attach_run", pnl_attach_run_with_token(connection, run_id, token, &run), 0) != PNL_OK)
        return 0;
    submit("submit", run, 1);
    report("flush", pnl_flush(run, DEADLINE_S), 0);
    report("wait_surfaces", pnl_wait_surfaces(run, 1, DEADLINE_S), 0);
    print_link("final", run);
    report("run_close", pnl_run_close(run, 1, DEADLINE_S), 0);
    report("disconnect", pnl_disconnect(connection), 0);
    return 0;
}

/* TLS but no token: the connection works, the calls that need a token say which. */
static int secure_refusals(const char *target, const char *options, const char *run_id)
{
    pnl_connection *connection = NULL;
    pnl_run *run = NULL;
    if (report("connect", pnl_connect_with(target, 60.0, options, &connection), 0) != PNL_OK)
        return 0;
    report("open_without_token", pnl_open_run(connection, spec, &run), 0);
    printf("run_is_null=%d\n", run == NULL);
    report("attach_without_token", pnl_attach_run(connection, run_id, &run), 0);
    report("attach_with_wrong_token", pnl_attach_run_with_token(connection, run_id, "not-the-writer-token", &run),
           0);
    report("disconnect", pnl_disconnect(connection), 0);
    char with_stranger[2048];
    snprintf(with_stranger, sizeof with_stranger, "%s; token=not-a-configured-token", options);
    if (report("connect_stranger", pnl_connect_with(target, 60.0, with_stranger, &connection), 0) != PNL_OK)
        return 0;
    report("open_with_unknown_token", pnl_open_run(connection, spec, &run), 0);
    report("disconnect_stranger", pnl_disconnect(connection), 0);
    return 0;
}

int main(int argc, char **argv)
{
    if (argc >= 4 && strcmp(argv[1], "unreachable") == 0)
        return unreachable(argv[2], atof(argv[3]));
    if (argc >= 4 && strcmp(argv[1], "pending-then-open") == 0)
        return pending_then_open(argv[2], atof(argv[3]));
    if (argc >= 4 && strcmp(argv[1], "secure-open") == 0)
        return secure_open(argv[2], argv[3]);
    if (argc >= 6 && strcmp(argv[1], "secure-attach") == 0)
        return secure_attach(argv[2], argv[3], argv[4], argv[5]);
    if (argc >= 5 && strcmp(argv[1], "secure-refusals") == 0)
        return secure_refusals(argv[2], argv[3], argv[4]);
    fprintf(stderr, "usage: see the comment at the top of pnl_link_probe.c\n");
    return 1;
}
