/*
 * test_queue.c - a model's record queue (core/queue.h), the learner's side:
 * queue_take hands out each durable record once, while queue_release may lag
 * it (the learner keeps records whose learning is in flight); the producer
 * gets back only released slots; idle and empty tell "nothing left to take"
 * from "nothing left to apply"; a stopped queue hands out what was never
 * taken, for its replies.  One thread plays all three roles, so every step
 * is deterministic.
 */
#include "testutil.h"

#include "core/queue.h"

/* The loop's part: k observations committed, then the writer's: durable. */
static void commit_durable(struct queue *q, size_t k)
{
    for (size_t i = 0; i < k; i++) {
        queue_rec_t *r = queue_slot(q, i);
        r->type = QREC_OBS;
    }
    queue_commit(q, k);
    uint64_t from, to;
    queue_pending(q, &from, &to);
    queue_set_durable(q, to);
}

static void take_lags_release(void **state)
{
    (void)state;
    struct queue *q = queue_new("m", 2, 8, 0);
    assert_int_equal(queue_space(q), 8);
    commit_durable(q, 6);
    assert_int_equal(queue_space(q), 2);
    assert_false(queue_idle(q));

    uint64_t from, to;
    assert_int_equal(queue_take(q, 4, &from, &to), 1);
    assert_int_equal(from, 0);
    assert_int_equal(to, 4);
    /* Taken, not released: the next take goes on from 4, and no slot is free yet. */
    assert_int_equal(queue_take(q, 4, &from, &to), 1);
    assert_int_equal(from, 4);
    assert_int_equal(to, 6);
    assert_true(queue_idle(q)); /* all durable records are taken */
    assert_int_equal(queue_space(q), 2);

    int empty = -1;
    queue_release(q, 3, &empty); /* learnt up to 3: three slots back */
    assert_int_equal(empty, 0);
    assert_int_equal(queue_space(q), 5);
    queue_release(q, 7, &empty); /* beyond what was taken: ignored */
    assert_int_equal(queue_space(q), 5);
    queue_release(q, 2, &empty); /* backwards: ignored */
    assert_int_equal(queue_space(q), 5);
    queue_release(q, 6, &empty);
    assert_int_equal(empty, 1);
    assert_int_equal(queue_space(q), 8);

    /* More records: taken from where the last take ended, not from the release. */
    commit_durable(q, 3);
    assert_false(queue_idle(q));
    assert_int_equal(queue_take(q, 100, &from, &to), 1);
    assert_int_equal(from, 6);
    assert_int_equal(to, 9);
    queue_release(q, 9, &empty);
    assert_int_equal(empty, 1);
    queue_free(q);
}

static void stopped_queue_gives_back_what_was_not_taken(void **state)
{
    (void)state;
    struct queue *q = queue_new("m", 1, 8, 0);
    commit_durable(q, 5);
    uint64_t from, to;
    assert_int_equal(queue_take(q, 2, &from, &to), 1);
    assert_int_equal(to, 2);
    queue_stop(q, 1); /* discard: nothing more to apply */
    assert_int_equal(queue_take(q, 2, &from, &to), 0);
    assert_int_equal(from, 2); /* records 0 and 1 were taken: they are the learner's */
    assert_int_equal(to, 5);
    queue_free(q);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(take_lags_release),
        cmocka_unit_test(stopped_queue_gives_back_what_was_not_taken),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
