/*
 * test_ser.c - byte encoding, checksum and the seeded generator.
 */
#include "testutil.h"

#include <zlib.h>

#include "learn/rng.h"
#include "learn/ser.h"
#include "worth/errors.h"

static void roundtrip_is_bit_exact(void **state)
{
    (void)state;
    uint8_t buf[64];
    ser_w w = {buf, sizeof buf, 0};
    double vals[3] = {-0.0, 0x1.fffffffffffffp+1023, 5e-324};
    ser_put_u32(&w, 0xdeadbeefu);
    ser_put_u64(&w, 0x0123456789abcdefULL);
    ser_put_f64v(&w, vals, 3);
    assert_true(ser_fits(&w));
    assert_int_equal(w.len, 4 + 8 + 24);
    /* Little-endian on the wire whatever the host. */
    assert_int_equal(buf[0], 0xef);
    assert_int_equal(buf[4], 0xef);

    ser_r r = {buf, w.len, 0, 0};
    assert_int_equal(ser_get_u32(&r), 0xdeadbeefu);
    assert_true(ser_get_u64(&r) == 0x0123456789abcdefULL);
    double back[3];
    ser_get_f64v(&r, back, 3);
    assert_int_equal(r.err, 0);
    assert_memory_equal(back, vals, sizeof vals);
    /* Reading past the end flags an error and returns zero, never reads beyond. */
    assert_int_equal(ser_get_u32(&r), 0);
    assert_int_equal(r.err, 1);
}

static void counting_writer_sizes(void **state)
{
    (void)state;
    ser_w w = {NULL, 0, 0};
    ser_put_f64(&w, 1.0);
    ser_put_u32(&w, 1);
    assert_int_equal(w.len, 12);
    assert_false(ser_fits(&w));
    uint8_t small[4];
    ser_w s = {small, sizeof small, 0};
    ser_put_u64(&s, 7);
    assert_false(ser_fits(&s));
}

static void crc32_check_value(void **state)
{
    (void)state;
    /* The CRC-32 check value of "123456789" is 0xCBF43926 (zlib; Python's zlib.crc32
     * gives the same). */
    assert_int_equal(ser_crc32("123456789", 9), 0xCBF43926u);
}

/* libdeflate's CRC-32 is zlib's on every length from 0 to 300 and on long buffers, from every
 * alignment (zlib's crc32 as the reference). */
static void crc32_is_zlibs(void **state)
{
    (void)state;
    static unsigned char b[70000];
    rng_t g;
    rng_init(&g, 99);
    for (size_t i = 0; i < sizeof b; i++)
        b[i] = (unsigned char)rng_next(&g);
    for (size_t off = 0; off < 8; off++) {
        for (size_t n = 0; n <= 300; n++)
            assert_int_equal(ser_crc32(b + off, n), (uint32_t)crc32(0L, b + off, (uInt)n));
        size_t n = sizeof b - off;
        assert_int_equal(ser_crc32(b + off, n), (uint32_t)crc32(0L, b + off, (uInt)n));
    }
}

static void rng_is_seeded_and_uniform(void **state)
{
    (void)state;
    rng_t a, b, c;
    rng_init(&a, 42);
    rng_init(&b, 42);
    rng_init(&c, 43);
    int same = 1, differs = 0;
    for (int i = 0; i < 100; i++) {
        uint64_t x = rng_next(&a), y = rng_next(&b), z = rng_next(&c);
        same &= x == y;
        differs |= x != z;
    }
    assert_true(same);
    assert_true(differs);

    /* rng_below: counts of 10 buckets over 100000 draws within 5 sd of 10000. */
    long counts[10] = {0};
    rng_init(&a, 7);
    for (int i = 0; i < 100000; i++) {
        uint64_t k = rng_below(&a, 10);
        assert_true(k < 10);
        counts[k]++;
    }
    for (int k = 0; k < 10; k++)
        assert_true(labs(counts[k] - 10000) < 5 * 95); /* sd = sqrt(100000*.1*.9) ~ 95 */
    double mean = 0;
    for (int i = 0; i < 100000; i++) {
        double u = rng_unit(&a);
        assert_true(u >= 0 && u < 1);
        mean += u;
    }
    assert_near(mean / 100000, 0.5, 5 * 0.2887 / sqrt(100000.0));
}

static void error_table_is_consistent(void **state)
{
    (void)state;
    assert_string_equal(worth_err_name(WORTH_E_BAD_DIMENSION), "bad_dimension");
    assert_string_equal(worth_err_name(0), "ok");
    assert_string_equal(worth_err_name(12345), "unknown_error");
    /* Every code in the table: negative (but OK), a distinct name, a message. */
    int codes[] = {
#define X(name, val, wire, msg) val,
        WORTH_ERRORS(X)
#undef X
    };
    size_t nc = sizeof codes / sizeof codes[0];
    for (size_t i = 0; i < nc; i++) {
        assert_true(codes[i] <= 0);
        assert_true(strlen(worth_strerror(codes[i])) > 0);
        for (size_t j = 0; j < i; j++) {
            assert_true(codes[i] != codes[j]);
            assert_true(strcmp(worth_err_name(codes[i]), worth_err_name(codes[j])) != 0);
        }
    }
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(roundtrip_is_bit_exact),    cmocka_unit_test(counting_writer_sizes),
        cmocka_unit_test(crc32_check_value),         cmocka_unit_test(crc32_is_zlibs),
        cmocka_unit_test(rng_is_seeded_and_uniform), cmocka_unit_test(error_table_is_consistent),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
