/* Times pnl_submit for bench_native_submit.py: SLICES submits of 3 patches (one 69x25x25, two
 * 35^3; 12 float64 ADM fields of flat space), printing one "blocked_s=..." line per submit.
 * The run's body lies far outside the data, so no finder work competes for the cores.
 * GAP_S seconds pass between submits (the evolution computing; the sender meanwhile sends).
 *   native_submit_timing HOST:PORT SLICES GAP_S */
#define _POSIX_C_SOURCE 200809L
#include <stdio.h>
#include <stdlib.h>
#include <time.h>

#include "penumbra_link.h"

static double now_s(void)
{
    struct timespec t;
    clock_gettime(CLOCK_MONOTONIC, &t);
    return t.tv_sec + 1e-9 * t.tv_nsec;
}

int main(int argc, char **argv)
{
    if (argc < 4)
        return fprintf(stderr, "usage: native_submit_timing HOST:PORT SLICES GAP_S\n"), 1;
    int slices = atoi(argv[2]);
    double gap_s = atof(argv[3]);
    struct timespec gap = {.tv_sec = (time_t)gap_s, .tv_nsec = (long)(1e9 * (gap_s - (time_t)gap_s))};
    const int shapes[3][3] = {{69, 25, 25}, {35, 35, 35}, {35, 35, 35}};
    pnl_patch patches[3];
    for (int p = 0; p < 3; ++p) {
        size_t n = (size_t)shapes[p][0] * shapes[p][1] * shapes[p][2];
        double *one = malloc(n * sizeof(double)), *zero = calloc(n, sizeof(double));
        const double **data = malloc(12 * sizeof *data);
        if (one == NULL || zero == NULL || data == NULL)
            return fprintf(stderr, "out of memory\n"), 1;
        for (size_t i = 0; i < n; ++i)
            one[i] = 1.0;
        for (int f = 0; f < 12; ++f)
            data[f] = (f == 0 || f == 3 || f == 5) ? one : zero;
        patches[p] = (pnl_patch){.field_names = "gamma_xx,gamma_xy,gamma_xz,gamma_yy,gamma_yz,gamma_zz,"
                                                "K_xx,K_xy,K_xz,K_yy,K_yz,K_zz",
                                 .field_count = 12, .field_data = data,
                                 .shape = {shapes[p][0], shapes[p][1], shapes[p][2]},
                                 .spacing = {0.05, 0.05, 0.05}, .origin = {-1.0 + p, -0.6, -0.6},
                                 .level = p > 0, .memory_order = PNL_ORDER_C};
    }
    pnl_connection *connection;
    pnl_run *run;
    if (pnl_connect(argv[1], 30.0, &connection) != PNL_OK ||
        pnl_open_run(connection, "variable_set=adm; name=native submit timing; queue_depth=2;"
                                 "body=A,500,500,500,1", &run) != PNL_OK)
        return fprintf(stderr, "%s\n", pnl_last_error()), 2;
    for (int n = 0; n < slices; ++n) {
        double start = now_s();
        int status = pnl_submit(run, 0.1 * n, n, 0, 1, patches, 3);
        double blocked = now_s() - start;
        if (status != PNL_OK)
            return fprintf(stderr, "%s\n", pnl_last_error()), 2;
        printf("blocked_s=%.6f\n", blocked);
        nanosleep(&gap, NULL);
    }
    pnl_run_close(run, 1, 300.0);
    pnl_disconnect(connection);
    return 0;
}
