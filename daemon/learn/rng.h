/*
 * rng.h - a small seeded generator for reproducible sampling.
 *
 * xoshiro256** (Blackman & Vigna 2018), seeded through splitmix64.  The C
 * library's rand() differs between platforms and has hidden global state; the
 * replay trainer needs a generator whose whole state is four words that go
 * into a checkpoint, so that a restored estimator draws the same batches.
 */
#ifndef WORTH_RNG_H
#define WORTH_RNG_H

#include <stdint.h>

/* Plain data: the whole generator state. */
typedef struct rng_t {
    uint64_t s[4];
} rng_t;

/* Seeds r from seed (any value, 0 included). */
void rng_init(rng_t *r, uint64_t seed);
/* Returns the next 64 random bits. */
uint64_t rng_next(rng_t *r);
/* Returns a uniform integer in [0, bound); bound must be > 0.  Unbiased (Lemire 2019). */
uint64_t rng_below(rng_t *r, uint64_t bound);
/* Returns a uniform double in [0, 1) with 53 random bits. */
double rng_unit(rng_t *r);

#endif /* WORTH_RNG_H */
