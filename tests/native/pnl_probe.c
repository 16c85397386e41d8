/*
 * pnl_probe: calls libpenumbra_link the wrong way (and a few right ways) and prints one line
 * per case, "case=NAME status=PNL_... elapsed_s=SECONDS message=TEXT", for
 * tests/native/test_native_examples.py to check. Exit status 0 means every case returned (no
 * abort, no exit from the library); the statuses are the test's business.
 *
 *   pnl_probe init                         pnl_init() alone (PENUMBRA_PYTHON decides)
 *   pnl_probe bad-input HOST:PORT          bad specs, bad patches, bad ranks on a real server
 */
#define _POSIX_C_SOURCE 200809L
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "penumbra_link.h"

#define N 9
#define FIELDS 12

static double now_s(void)
{
    struct timespec t;
    clock_gettime(CLOCK_MONOTONIC, &t);
    return t.tv_sec + 1e-9 * t.tv_nsec;
}

static void report(const char *name, int status, double elapsed_s)
{
    printf("case=%s status=%s elapsed_s=%.3f message=%s\n", name, pnl_status_name(status), elapsed_s,
           pnl_last_error());
    fflush(stdout);
}

static const char names[] = "gamma_xx,gamma_xy,gamma_xz,gamma_yy,gamma_yz,gamma_zz,K_xx,K_xy,K_xz,K_yy,K_yz,K_zz";
static double one[N * N * N], zero[N * N * N];
static const double *data[FIELDS];

/* A flat-space patch of N^3 nodes around the origin (finite, valid data). */
static pnl_patch flat_patch(void)
{
    for (int i = 0; i < N * N * N; ++i) {
        one[i] = 1.0;
        zero[i] = 0.0;
    }
    for (int f = 0; f < FIELDS; ++f)
        data[f] = (f == 0 || f == 3 || f == 5) ? one : zero;
    pnl_patch p = {.field_names = names, .field_count = FIELDS, .field_data = data, .shape = {N, N, N},
                   .spacing = {0.1, 0.1, 0.1}, .origin = {-0.4, -0.4, -0.4}, .level = 0,
                   .memory_order = PNL_ORDER_C};
    return p;
}

static int bad_input(const char *target)
{
    pnl_connection *connection = NULL;
    pnl_run *run = NULL;
    int status = pnl_connect(target, 30.0, &connection);
    report("connect", status, 0);
    if (status != PNL_OK)
        return 0;
    const char *body = "body=A,0.013,-0.021,0.017,1.0";
    char spec[256];
    snprintf(spec, sizeof spec, "variable_set=adm; lmx=8; %s", body);
    report("spec_unknown_key", pnl_open_run(connection, spec, &run), 0);
    report("spec_short_body", pnl_open_run(connection, "variable_set=adm; body=A,1,2,3", &run), 0);
    report("spec_bad_number", pnl_open_run(connection, "variable_set=adm; lmax=eight; body=A,0,0,0,1", &run), 0);
    snprintf(spec, sizeof spec, "variable_set=adm; lmax_cap=40; %s", body);
    report("spec_lmax_cap_too_high", pnl_open_run(connection, spec, &run), 0);
    snprintf(spec, sizeof spec, "variable_set=adm; lmax=8; lmax_cap=12; %s", body); /* below lmax_common 16 */
    report("spec_lmax_cap_below_common", pnl_open_run(connection, spec, &run), 0);
    report("spec_no_variable_set", pnl_open_run(connection, body, &run), 0);
    snprintf(spec, sizeof spec, "variable_set=adm; inner_common=yes; %s", body);
    report("spec_bad_flag", pnl_open_run(connection, spec, &run), 0);
    report("spec_null", pnl_open_run(connection, NULL, &run), 0);
    report("attach_unknown_run", pnl_attach_run(connection, "run-does-not-exist", &run), 0);
    report("attach_null_token", pnl_attach_run_with_token(connection, "run-does-not-exist", NULL, &run), 0);
    pnl_connection *other = NULL;
    report("options_unknown_key", pnl_connect_with(target, 30.0, "tls=0; tokn=abc", &other), 0);
    report("options_cert_without_key", pnl_connect_with(target, 30.0, "tls_cert=/nonexistent/client.crt", &other), 0);
    report("options_missing_token_file",
           pnl_connect_with(target, 30.0, "token_file=/nonexistent/penumbra.token", &other), 0);
    report("options_token_twice", pnl_connect_with(target, 30.0, "token=abc;token_file=/etc/hostname", &other), 0);
    printf("other_is_null=%d\n", other == NULL);
    snprintf(spec, sizeof spec, "variable_set=adm; name=probe; lmax=4; lmax_cap=20; inner_common=0; %s", body);
    status = pnl_open_run(connection, spec, &run);
    report("open_run", status, 0);
    if (status != PNL_OK)
        return 0;

    pnl_guidance_info info;
    pnl_body_guidance bodies[1];
    report("guidance_before_any", pnl_latest_guidance(run, 1, &info, bodies, 1), 0);

    pnl_patch p = flat_patch();
    report("null_patches", pnl_submit(run, 0.0, 0, 0, 1, NULL, 1), 0);
    pnl_patch q = p;
    const double *holes[FIELDS];
    memcpy(holes, data, sizeof holes);
    holes[3] = NULL;
    q.field_data = holes;
    report("null_field_pointer", pnl_submit(run, 0.0, 0, 0, 1, &q, 1), 0);
    q = p;
    q.memory_order = 7;
    report("bad_memory_order", pnl_submit(run, 0.0, 0, 0, 1, &q, 1), 0);
    q = p;
    q.shape[0] = 1;
    report("short_axis", pnl_submit(run, 0.0, 0, 0, 1, &q, 1), 0);
    report("bad_rank", pnl_submit(run, 0.0, 0, 2, 2, &p, 1), 0);
    q = p;
    q.field_names = "gamma_xx,gamma_xy,gamma_xz,gamma_yy,gamma_yz,gamma_qq,K_xx,K_xy,K_xz,K_yy,K_yz,K_zz";
    report("unknown_field", pnl_submit(run, 0.0, 0, 0, 1, &q, 1), 0);
    q = p;
    q.field_count = FIELDS - 1;
    report("name_count_mismatch", pnl_submit(run, 0.0, 0, 0, 1, &q, 1), 0);
    q = p;
    q.spacing[1] = -0.1;
    report("negative_spacing", pnl_submit(run, 0.0, 0, 0, 1, &q, 1), 0);
    zero[N * N * 4 + N * 4 + 4] = NAN;
    report("nan_value", pnl_submit(run, 0.0, 0, 0, 1, &p, 1), 0);
    zero[N * N * 4 + N * 4 + 4] = 0.0;
    report("bad_timeout", pnl_wait_surfaces(run, 0, 0.0), 0);
    report("two_ranks", pnl_submit(run, 0.0, 0, 1, 2, &p, 1), 0);
    /* Settle whatever became of that part, so the next flush speaks of the next slice only. */
    report("flush_after_two_ranks", pnl_flush(run, 120.0), 0);

    /* The contract that the caller may reuse its buffers at once: overwrite them with NaN
     * right after the call; the server refuses non-finite data, so a slice sent from the
     * caller's memory (not the copy) would come back refused from pnl_flush. */
    double started = now_s();
    status = pnl_submit(run, 0.5, 1, 0, 1, &p, 1);
    for (int i = 0; i < N * N * N; ++i)
        one[i] = zero[i] = NAN;
    report("submit_then_overwrite", status, now_s() - started);
    report("flush_after_overwrite", pnl_flush(run, 120.0), 0);
    char run_id[PNL_RUN_ID_CAPACITY];
    report("run_id_small_buffer", pnl_run_id(run, run_id, 4), 0);
    char token[PNL_WRITER_TOKEN_CAPACITY];
    report("writer_token", pnl_writer_token(run, token, sizeof token), 0);
    printf("writer_token_length=%d\n", (int)strlen(token));
    report("link_stats_null", pnl_link_stats(run, NULL), 0);
    pnl_link_report link;
    report("link_stats", pnl_link_stats(run, &link), 0);
    printf("link state=%d submitted=%lld sent=%lld refused=%lld dropped=%lld queued=%lld\n", link.state,
           link.submitted, link.sent, link.refused, link.dropped, link.queued);
    status = pnl_run_id(run, run_id, sizeof run_id);
    printf("run_id: %s\n", status == PNL_OK ? run_id : "?");
    report("run_close", pnl_run_close(run, 1, 120.0), 0);
    report("disconnect", pnl_disconnect(connection), 0);
    report("disconnect_null", pnl_disconnect(NULL), 0);
    return 0;
}

int main(int argc, char **argv)
{
    if (argc >= 2 && strcmp(argv[1], "init") == 0) {
        double started = now_s();
        int status = pnl_init();
        report("init", status, now_s() - started);
        return 0;
    }
    if (argc >= 3 && strcmp(argv[1], "bad-input") == 0)
        return bad_input(argv[2]);
    fprintf(stderr, "usage: pnl_probe init | bad-input HOST:PORT\n");
    return 1;
}
