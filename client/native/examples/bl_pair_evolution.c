/*
 * bl_pair_evolution.c -- a stand-in evolution code that uses Penumbra through the C interface.
 *
 * It computes time-symmetric Brill-Lindquist data for two punctures on two refinement levels
 * (one coarse box around the pair, one fine box around each hole), submits a few slices while
 * the punctures drift a little, then reads back the horizons and the refinement guidance.
 * Exit status 0 only if both individual horizons were found in the last slice.
 *
 *   bl_pair_evolution_c [HOST:PORT]        (default: $PENUMBRA_SERVER)
 *
 * Data (G = c = 1, lengths in M): gamma_ij = psi^4 delta_ij, K_ij = 0,
 * psi = 1 + m1 / (2 r1) + m2 / (2 r2). With m1 = m2 = 0.5 at x = +-1.5 each horizon has a
 * coordinate radius of about m_i / 2 = 0.25 (a bit less: the other hole's term adds to psi),
 * so the fine spacing 0.035 puts about 13 points across it.
 */
#define _POSIX_C_SOURCE 200809L /* clock_gettime, nanosleep */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "penumbra_link.h"

#define SLICES 6
#define FIELDS 12
#define HOLES 2

static const double masses[HOLES] = {0.5, 0.5};
static const char *const labels[HOLES] = {"A", "B"};
/* One name per field, in the order of the pointers below. */
static const char field_names[] =
    "gamma_xx,gamma_xy,gamma_xz,gamma_yy,gamma_yz,gamma_zz,K_xx,K_xy,K_xz,K_yy,K_yz,K_zz";

/* Puncture positions at slice n: drifting inwards a little, never on a grid node (y, z offsets). */
static void puncture(int hole, int n, double out[3])
{
    double sign = hole == 0 ? 1.0 : -1.0;
    out[0] = sign * (1.5 - 0.02 * n);
    out[1] = 0.011 + 0.002 * n;
    out[2] = 0.017;
}

typedef struct {
    int shape[3];
    double origin[3], spacing;
    int level;
    double *psi4;  /* psi^4 at every node, C order (k fastest) */
    double *zeros; /* the vanishing components share one buffer */
    const double *data[FIELDS];
} box;

static int make_box(box *b, const double centre[3], const int shape[3], double spacing, int level)
{
    size_t nodes = (size_t)shape[0] * shape[1] * shape[2];
    b->psi4 = malloc(nodes * sizeof(double));
    b->zeros = calloc(nodes, sizeof(double));
    if (b->psi4 == NULL || b->zeros == NULL)
        return -1;
    for (int d = 0; d < 3; ++d) {
        b->shape[d] = shape[d];
        b->origin[d] = centre[d] - 0.5 * (shape[d] - 1) * spacing;
    }
    b->spacing = spacing;
    b->level = level;
    /* gamma_xx, gamma_yy, gamma_zz = psi^4; every other component vanishes. */
    for (int f = 0; f < FIELDS; ++f)
        b->data[f] = (f == 0 || f == 3 || f == 5) ? b->psi4 : b->zeros;
    return 0;
}

/* Overwrite the box's psi^4 for slice n (the same buffer every slice: pnl_submit copied it). */
static void fill_box(box *b, int n)
{
    double p[HOLES][3];
    for (int h = 0; h < HOLES; ++h)
        puncture(h, n, p[h]);
    for (int i = 0; i < b->shape[0]; ++i)
        for (int j = 0; j < b->shape[1]; ++j)
            for (int k = 0; k < b->shape[2]; ++k) {
                double x[3] = {b->origin[0] + i * b->spacing, b->origin[1] + j * b->spacing,
                               b->origin[2] + k * b->spacing};
                double psi = 1.0;
                for (int h = 0; h < HOLES; ++h) {
                    double dx = x[0] - p[h][0], dy = x[1] - p[h][1], dz = x[2] - p[h][2];
                    psi += masses[h] / (2.0 * sqrt(dx * dx + dy * dy + dz * dz));
                }
                b->psi4[((size_t)i * b->shape[1] + j) * b->shape[2] + k] = psi * psi * psi * psi;
            }
}

static pnl_patch as_patch(const box *b)
{
    pnl_patch p = {.field_names = field_names, .field_count = FIELDS, .field_data = b->data,
                   .level = b->level, .memory_order = PNL_ORDER_C};
    for (int d = 0; d < 3; ++d) {
        p.shape[d] = b->shape[d];
        p.spacing[d] = b->spacing;
        p.origin[d] = b->origin[d];
    }
    return p;
}

static double now_s(void)
{
    struct timespec t;
    clock_gettime(CLOCK_MONOTONIC, &t);
    return t.tv_sec + 1e-9 * t.tv_nsec;
}

static int compare(const void *a, const void *b)
{
    double x = *(const double *)a, y = *(const double *)b;
    return (x > y) - (x < y);
}

static int failed(const char *what, int status)
{
    fprintf(stderr, "bl_pair_evolution: %s failed: %s: %s\n", what, pnl_status_name(status), pnl_last_error());
    return 2;
}

int main(int argc, char **argv)
{
    const char *target = argc > 1 ? argv[1] : getenv("PENUMBRA_SERVER");
    if (target == NULL || target[0] == '\0') {
        fprintf(stderr, "usage: %s HOST:PORT (or set PENUMBRA_SERVER)\n", argv[0]);
        return 1;
    }
    /* Two levels: a coarse box around the pair, a fine box around each hole's start. */
    box boxes[3];
    const int coarse_shape[3] = {69, 25, 25}, fine_shape[3] = {35, 35, 35};
    const double origin_centre[3] = {0.0, 0.0, 0.0};
    int ok = make_box(&boxes[0], origin_centre, coarse_shape, 0.07, 0) == 0;
    for (int h = 0; h < HOLES && ok; ++h) {
        double c[3];
        puncture(h, 0, c);
        c[1] = c[2] = 0.0;
        ok = make_box(&boxes[1 + h], c, fine_shape, 0.035, 1) == 0;
    }
    if (!ok) {
        fprintf(stderr, "bl_pair_evolution: out of memory\n");
        return 1;
    }
    double slice_mib = 0;
    for (int b = 0; b < 3; ++b)
        slice_mib += FIELDS * 8.0 * boxes[b].shape[0] * boxes[b].shape[1] * boxes[b].shape[2] / (1024.0 * 1024.0);

    pnl_connection *connection = NULL;
    pnl_run *run = NULL;
    /* TLS and tokens, if the server wants them: e.g. PENUMBRA_LINK_OPTIONS="tls_ca=server.crt;
     * token_file=opener.token" (see pnl_connect_with in penumbra_link.h). */
    int status = pnl_connect_with(target, 20.0, getenv("PENUMBRA_LINK_OPTIONS"), &connection);
    if (PNL_FAILED(status))
        return failed("pnl_connect", status);
    if (status == PNL_PENDING) /* not a failure: the connection keeps trying while we evolve */
        printf("%s\n", pnl_last_error());
    char spec[512];
    double a[3], b[3];
    puncture(0, 0, a);
    puncture(1, 0, b);
    snprintf(spec, sizeof spec,
             "variable_set=adm; name=Brill-Lindquist pair (C example); lmax=8; queue_depth=%d;"
             "body=%s,%g,%g,%g,%g; body=%s,%g,%g,%g,%g",
             SLICES, labels[0], a[0], a[1], a[2], masses[0], labels[1], b[0], b[1], b[2], masses[1]);
    if (PNL_FAILED(status = pnl_open_run(connection, spec, &run)))
        return failed("pnl_open_run", status);
    if (status == PNL_PENDING) /* slices queue (keep newest) until the run opens */
        printf("%s\n", pnl_last_error());

    double blocked[SLICES];
    for (int n = 0; n < SLICES; ++n) {
        pnl_patch patches[3];
        for (int p = 0; p < 3; ++p) {
            fill_box(&boxes[p], n);
            patches[p] = as_patch(&boxes[p]);
        }
        double start = now_s();
        status = pnl_submit(run, 0.25 * n, n, 0, 1, patches, 3);
        blocked[n] = now_s() - start;
        if (status != PNL_OK)
            return failed("pnl_submit", status);
        printf("submitted iteration %d (t = %.2f M): the call blocked %.2f ms\n", n, 0.25 * n, 1e3 * blocked[n]);
    }
    qsort(blocked, SLICES, sizeof blocked[0], compare);
    printf("submit blocking: median %.2f ms, max %.2f ms over %d submits of %.1f MiB slices (3 patches)\n",
           1e3 * 0.5 * (blocked[(SLICES - 1) / 2] + blocked[SLICES / 2]), 1e3 * blocked[SLICES - 1], SLICES,
           slice_mib);
    fflush(stdout);

    const int last = SLICES - 1;
    if ((status = pnl_flush(run, 300.0)) != PNL_OK)
        return failed("pnl_flush", status);
    /* Flushed, so the run is open and has its id (keep it to attach again after a restart). */
    char run_id[PNL_RUN_ID_CAPACITY];
    if ((status = pnl_run_id(run, run_id, sizeof run_id)) != PNL_OK)
        return failed("pnl_run_id", status);
    printf("run_id: %s\n", run_id);
    pnl_link_report link;
    if ((status = pnl_link_stats(run, &link)) == PNL_OK)
        printf("link: %lld submitted, %lld sent, %lld dropped locally, %lld refused\n", link.submitted, link.sent,
               link.dropped, link.refused);
    if ((status = pnl_wait_surfaces(run, last, 600.0)) != PNL_OK)
        return failed("pnl_wait_surfaces", status);
    pnl_surface surfaces[8];
    int count = 0;
    if ((status = pnl_latest_surfaces(run, 1, surfaces, 8, &count)) != PNL_OK)
        return failed("pnl_latest_surfaces", status);
    int found = 0;
    for (int s = 0; s < count && s < 8; ++s) {
        pnl_surface *f = &surfaces[s];
        printf("surface %s: latest attempt (iteration %lld) %s; found at iteration %lld: area %.5f M^2, "
               "irreducible mass %.5f M, centroid (%.4f, %.4f, %.4f), mean radius %.4f M\n",
               f->label, f->latest_attempt_iteration, f->latest_attempt_found ? "found" : "missed",
               f->found_iteration, f->area, f->irreducible_mass, f->centroid[0], f->centroid[1], f->centroid[2],
               f->radius_mean);
        for (int h = 0; h < HOLES; ++h)
            found += strcmp(f->label, labels[h]) == 0 && f->latest_attempt_found && f->found_iteration == last;
    }

    /* The guidance for the last slice follows its surfaces; poll the cache with a deadline. */
    pnl_guidance_info info;
    pnl_body_guidance guided[HOLES];
    double give_up = now_s() + 120.0;
    while ((status = pnl_latest_guidance(run, 0, &info, guided, HOLES)) == PNL_NOT_FOUND ||
           (status == PNL_OK && info.iteration < last)) {
        if (now_s() > give_up)
            break;
        nanosleep(&(struct timespec){.tv_nsec = 50000000}, NULL);
    }
    if (status != PNL_OK)
        return failed("pnl_latest_guidance", status);
    printf("guidance from iteration %lld, valid for t in [%.2f, %.2f] M:\n", info.iteration, info.valid_from,
           info.valid_until);
    for (int g = 0; g < info.body_count && g < HOLES; ++g) {
        printf("  body %s: centre (%.4f, %.4f, %.4f), finest level %d spacing %.4f M, radii", guided[g].label,
               guided[g].centre[0], guided[g].centre[1], guided[g].centre[2], guided[g].finest_level,
               guided[g].finest_spacing);
        for (int l = 0; l < guided[g].level_count; ++l)
            printf(" %.3f", guided[g].radii[l]);
        printf(" M\n");
    }

    if ((status = pnl_run_close(run, 1, 300.0)) != PNL_OK)
        return failed("pnl_run_close", status);
    if ((status = pnl_disconnect(connection)) != PNL_OK)
        return failed("pnl_disconnect", status);
    for (int p = 0; p < 3; ++p) {
        free(boxes[p].psi4);
        free(boxes[p].zeros);
    }
    if (found != HOLES) {
        fprintf(stderr, "bl_pair_evolution: FAILED: %d of the %d horizons were found in the last slice "
                        "(iteration %d)\n", found, HOLES, last);
        return 3;
    }
    printf("both horizons found in the last slice\n");
    return 0;
}
