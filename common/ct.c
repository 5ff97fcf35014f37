/*
 * ct.c - constant-time comparison (ct.h).
 *
 * Walks every byte of want whatever have holds, and accumulates the
 * differences in a volatile so the compiler cannot stop at the first one.
 */
#include "common/ct.h"

int ct_equal(const void *have, size_t have_len, const void *want, size_t want_len)
{
    const unsigned char *h = have, *w = want;
    volatile unsigned char diff = (unsigned char)(have_len != want_len);
    for (size_t i = 0; i < want_len; i++)
        diff |= (unsigned char)(w[i] ^ (i < have_len ? h[i] : 0));
    return diff == 0;
}
