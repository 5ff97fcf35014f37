/*
 * rng.c - xoshiro256** and splitmix64 seeding.
 *
 * Pure functions of the state passed in; no globals, safe from any thread that
 * owns its rng_t.  The output sequence for a seed is part of the checkpoint
 * format's meaning: changing the algorithm changes what a replayed log rebuilds.
 */
#include "learn/rng.h"

static uint64_t splitmix64(uint64_t *x)
{
    uint64_t z = (*x += 0x9e3779b97f4a7c15ULL);
    z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9ULL;
    z = (z ^ (z >> 27)) * 0x94d049bb133111ebULL;
    return z ^ (z >> 31);
}

static uint64_t rotl(uint64_t x, int k)
{
    return (x << k) | (x >> (64 - k));
}

void rng_init(rng_t *r, uint64_t seed)
{
    uint64_t x = seed;
    for (int i = 0; i < 4; i++)
        r->s[i] = splitmix64(&x);
}

uint64_t rng_next(rng_t *r)
{
    uint64_t *s = r->s;
    uint64_t out = rotl(s[1] * 5, 7) * 9;
    uint64_t t = s[1] << 17;
    s[2] ^= s[0];
    s[3] ^= s[1];
    s[1] ^= s[2];
    s[0] ^= s[3];
    s[2] ^= t;
    s[3] = rotl(s[3], 45);
    return out;
}

uint64_t rng_below(rng_t *r, uint64_t bound)
{
    /* Lemire's multiply-shift with rejection of the short interval. */
    unsigned __int128 m = (unsigned __int128)rng_next(r) * bound;
    uint64_t lo = (uint64_t)m;
    if (lo < bound) {
        uint64_t thresh = (0 - bound) % bound;
        while (lo < thresh) {
            m = (unsigned __int128)rng_next(r) * bound;
            lo = (uint64_t)m;
        }
    }
    return (uint64_t)(m >> 64);
}

double rng_unit(rng_t *r)
{
    return (double)(rng_next(r) >> 11) * 0x1.0p-53;
}
