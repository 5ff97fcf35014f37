/*
 * ct.h - the one constant-time comparison of secrets (tokens).
 *
 * The time taken depends only on the lengths, never on where the bytes
 * differ, so a client timing its failed attempts learns nothing of the
 * token but perhaps its length.
 */
#ifndef WORTH_CT_H
#define WORTH_CT_H

#include <stddef.h>

/* Returns 1 when have (have_len bytes) equals want (want_len bytes), else 0. */
int ct_equal(const void *have, size_t have_len, const void *want, size_t want_len);

#endif /* WORTH_CT_H */
