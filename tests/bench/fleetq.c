/*
 * fleetq.c - question latency against a worth fleet (tests/bench/fleet.py).
 *
 *   fleetq URLS SUBJECT N JSON
 *
 * Sends JSON to SUBJECT (worth.ask.<model>: the owner; worth.via.<node>.<model>: through a
 * node that forwards) N times, one at a time, and prints one JSON line: the round trip's
 * p50, p99, p99.9 and max in microseconds, and how many answers said ok.
 */
#include <nats/nats.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "common/natsurls.h"

static int cmp(const void *a, const void *b)
{
    double x = *(const double *)a, y = *(const double *)b;
    return x < y ? -1 : x > y;
}

static double now_us(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return ts.tv_sec * 1e6 + ts.tv_nsec / 1e3;
}

int main(int argc, char **argv)
{
    if (argc != 5) {
        fprintf(stderr, "usage: fleetq URLS SUBJECT N JSON\n");
        return 2;
    }
    int n = atoi(argv[3]);
    natsOptions *o = NULL;
    natsConnection *nc = NULL;
    if (n <= 0 || natsOptions_Create(&o) != NATS_OK || natsurls_set(o, argv[1]) != NATS_OK ||
        natsOptions_SetSendAsap(o, true) != NATS_OK || natsConnection_Connect(&nc, o) != NATS_OK) {
        fprintf(stderr, "fleetq: cannot connect to %s\n", argv[1]);
        return 1;
    }
    double *t = malloc((size_t)n * sizeof *t);
    int ok = 0;
    for (int i = 0; i < n && t; i++) {
        natsMsg *m = NULL;
        double t0 = now_us();
        natsStatus st = natsConnection_RequestString(&m, nc, argv[2], argv[4], 5000);
        t[i] = now_us() - t0;
        if (st == NATS_OK && strstr(natsMsg_GetData(m), "\"ok\":true"))
            ok++;
        natsMsg_Destroy(m);
    }
    if (t) {
        qsort(t, (size_t)n, sizeof *t, cmp);
        printf("{\"n\":%d,\"ok\":%d,\"p50_us\":%.1f,\"p99_us\":%.1f,\"p999_us\":%.1f,"
               "\"max_us\":%.1f}\n",
               n, ok, t[n / 2], t[(int)(n * 0.99)], t[(int)(n * 0.999)], t[n - 1]);
    }
    free(t);
    natsConnection_Destroy(nc);
    natsOptions_Destroy(o);
    nats_CloseAndWait(5000); /* the library's threads end before exit: no use after free */
    return t && ok == n ? 0 : 1;
}
