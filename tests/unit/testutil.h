/*
 * testutil.h - small helpers shared by the C tests (cmocka).
 *
 * Assertions print both values, as the conventions ask, so a failure in CI
 * says what was expected and what came out.
 */
#ifndef WORTH_TESTUTIL_H
#define WORTH_TESTUTIL_H

#include <math.h>
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include <cmocka.h>

/* Fails unless |a - b| <= tol; prints both values. */
#define assert_near(a, b, tol)                                                                     \
    do {                                                                                           \
        double a_ = (a), b_ = (b), t_ = (tol);                                                     \
        if (!(fabs(a_ - b_) <= t_)) {                                                              \
            print_error("%s = %.17g, %s = %.17g, differ by %.3g > %.3g\n", #a, a_, #b, b_,         \
                        fabs(a_ - b_), t_);                                                        \
            fail();                                                                                \
        }                                                                                          \
    } while (0)

/* Fails unless a < b; prints both values. */
#define assert_below(a, b)                                                                         \
    do {                                                                                           \
        double a_ = (a), b_ = (b);                                                                 \
        if (!(a_ < b_)) {                                                                          \
            print_error("expected %s = %.17g < %s = %.17g\n", #a, a_, #b, b_);                     \
            fail();                                                                                \
        }                                                                                          \
    } while (0)

#endif /* WORTH_TESTUTIL_H */
