/*
 * natsurls.h - a comma-separated list of NATS server URLs set on nats.c's
 * options (natsOptions_SetURL takes one URL; SetServers takes an array).
 * Shared by `worthd fleet` and `worth fleet`.
 */
#ifndef WORTH_NATSURLS_H
#define WORTH_NATSURLS_H

#include <nats/nats.h>

/* Sets the servers of urls ("nats://a:4222,nats://b:4222"; blanks around commas are
 * ignored) on o.  Returns NATS_OK, or NATS_INVALID_ARG for an empty list or one of more
 * than 32 URLs. */
natsStatus natsurls_set(natsOptions *o, const char *urls);

#endif /* WORTH_NATSURLS_H */
