/*
 * fleet.h - worthd as one node of a fleet on NATS JetStream (`worthd fleet ...`).
 *
 * Opt-in: without the `fleet` word worthd runs exactly as the single node on
 * its SQLite file.  In the fleet, the JetStream stream WORTH is the durable
 * log: producers publish each transition to worth.in.<model>, which the
 * servers' subject mapping (contrib/nats/) turns into worth.t.<shard>.<model>.
 * Each shard is owned by one node at a time through a lease in the key-value
 * bucket worth_lease; the owner learns its shards' messages in stream order
 * and stores checkpoints (the sequence they cover with every model's state) in
 * worth_ckpt, so that a node taking a shard over restores the newest one and
 * replays the stream after it, bit for bit.  doc/fleet.md has the whole design.
 */
#ifndef WORTH_FLEET_H
#define WORTH_FLEET_H

#include <stdint.h>

/* Plain data: a node's options. */
typedef struct fleet_opts_t {
    const char *urls;    /* NATS server URLs, comma-separated */
    char node[64];       /* this node's name, [A-Za-z0-9_-] */
    unsigned shards;     /* shards of the fleet (= the mapping's partition count) */
    unsigned replicas;   /* replicas of the stream and buckets it creates */
    int64_t lease_ms;    /* a lease not renewed for this long may be taken over */
    uint64_t ckpt_every; /* checkpoint a shard after this many messages ... */
    int64_t ckpt_ms;     /* ... or this long after the last, when it learnt any */
    int quiet;           /* log warnings and errors only */
    const char *metrics; /* HOST:PORT for GET /metrics over HTTP, or NULL */
} fleet_opts_t;

/* Runs `worthd fleet ARGS`: parses argv (argv[0] is "fleet") and runs the node until
 * SIGINT or SIGTERM.  Returns the process exit code (0, 1 on failure, 2 on usage). */
int fleet_main(int argc, char **argv);

#endif /* WORTH_FLEET_H */
