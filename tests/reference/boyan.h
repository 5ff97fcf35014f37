/*
 * boyan.h - Boyan's chain (Boyan 2002, "Technical update: least-squares
 * temporal difference learning", Machine Learning 49, 233-246).
 *
 * States 12..0, 0 absorbing; every episode starts at 12; gamma = 1.  From
 * s >= 2 the chain moves to s-1 or s-2 with probability 1/2 each, reward -3;
 * from 1 to 0, reward -2.  Four features interpolate linearly between the
 * anchor states 12, 8, 4 and 0.  The true values are V(s) = -2s, which the
 * features represent exactly with w = [-24, -16, -8, 0].
 */
#ifndef WORTH_TEST_BOYAN_H
#define WORTH_TEST_BOYAN_H

#include <string.h>

#define BOYAN_N 4

static const double boyan_w[BOYAN_N] = {-24, -16, -8, 0};

/* phi(s): feature j belongs to anchor 12 - 4j; s lies between two anchors. */
static inline void boyan_phi(int s, double *phi)
{
    memset(phi, 0, BOYAN_N * sizeof *phi);
    int j = (12 - s) / 4; /* anchor at or above s */
    if (j >= BOYAN_N - 1) {
        phi[BOYAN_N - 1] = 1.0;
        return;
    }
    int above = 12 - 4 * j;
    phi[j] = 1.0 - (above - s) / 4.0;
    phi[j + 1] = (above - s) / 4.0;
}

#endif
