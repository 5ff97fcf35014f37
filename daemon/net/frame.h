/*
 * frame.h - one connection's input: the buffer and the framing state machine.
 *
 * A connection's bytes are request lines of at most max_line bytes (without
 * the newline; a trailing "\r" is dropped), except that after a bulk header
 * the next N bytes are a binary payload handed over whole.  The framer holds
 * the input buffer and tells its owner, one event at a time, what comes next;
 * it never calls anything and knows nothing of sockets or of the protocol, so
 * the server and the fuzz target drive the same code.
 *
 * Usage: frame_space() / frame_filled() around each read; then frame_next()
 * until it returns FRAME_MORE, calling frame_consume() after each LINE, BLANK
 * or BULK event once it has been handled.  An event not consumed (the request
 * was parked) is returned again, identical, by the next frame_next().
 * TOO_LONG, TRUNCATED and OVER_BUDGET end the stream: nothing more is framed
 * after them.
 *
 * Memory: every byte the framer holds is charged to a budget (budget.h) shared
 * by all connections: the input buffer (FRAME_IN_START at first, grown only
 * while a line needs it, shrunk back once it has gone) and a bulk payload,
 * reserved whole when announced but allocated only as its bytes arrive.
 */
#ifndef WORTH_FRAME_H
#define WORTH_FRAME_H

#include <stddef.h>

#include "net/budget.h"

/* Most bytes the framer asks for per read. */
#define FRAME_READ_CHUNK 65536
/* The input buffer's initial size: what an idle connection holds. */
#define FRAME_IN_START 16384
/* The buffer grows when less room than this is left for a read. */
#define FRAME_READ_MIN 4096
/* A bulk payload buffer larger than this is freed once its payload is handled. */
#define FRAME_BULK_KEEP (1u << 20)

/* What frame_next found. */
enum frame_kind {
    FRAME_MORE = 0,   /* nothing complete yet: read more (or, at EOF, the stream is done) */
    FRAME_LINE,       /* a request line: line, len (without "\n" and a final "\r") */
    FRAME_BLANK,      /* an empty or all-blank line: consume it, nothing to handle */
    FRAME_BULK,       /* a complete bulk payload: data, len */
    FRAME_TOO_LONG,   /* a line longer than max_line: answer and close */
    FRAME_TRUNCATED,  /* EOF inside a bulk payload: got bytes of len arrived; nothing to apply */
    FRAME_OVER_BUDGET /* the buffer budget cannot hold the line that is arriving: answer, close */
};

/* Plain data: one event; pointers borrowed from the framer until the next call. */
typedef struct frame_ev_t {
    enum frame_kind kind;
    const char *line;          /* FRAME_LINE */
    const unsigned char *data; /* FRAME_BULK */
    size_t len;                /* LINE: bytes; BULK, TRUNCATED: payload size */
    size_t got;                /* TRUNCATED: payload bytes that arrived */
} frame_ev_t;

/* Plain data: the state, embedded in a connection (fields private to frame.c). */
typedef struct frame_t {
    size_t max_line;
    budget_t *budget; /* shared; NULL for none */
    size_t charged;   /* bytes charged to it: cap, and bulk_cap or the payload reserved */
    char *in;         /* input buffer; [off, len) unread */
    size_t len, off, cap;
    unsigned char *bulk; /* payload buffer, kept for the next bulk up to FRAME_BULK_KEEP */
    size_t bulk_need, bulk_have, bulk_cap;
    int in_bulk;
    size_t skip;          /* payload bytes still to drop (a refused bulk) */
    size_t pending;       /* bytes the last LINE or BLANK event covers */
    enum frame_kind last; /* kind of the last event, for frame_consume */
    int ended;            /* TOO_LONG, TRUNCATED or OVER_BUDGET was returned */
    int starved;          /* frame_space gave no room: the budget refused to grow the buffer */
} frame_t;

/* Lifecycle */

/*
 * Initialises f for lines of at most max_line bytes (allocates FRAME_IN_START,
 * charged to b, which may be NULL; borrowed for f's life).  Returns 0, or -1
 * when the budget cannot give it (f then holds nothing; frame_close is safe).
 */
int frame_init(frame_t *f, size_t max_line, budget_t *b);
/* Frees f's buffers. */
void frame_close(frame_t *f);
/* Starts a new stream on f's buffers (for tests and the fuzz target, which reuse a framer). */
void frame_reset(frame_t *f);

/* Operate */

/*
 * Sets *buf and *room to where the next read may write (at most
 * FRAME_READ_CHUNK bytes; borrowed until frame_filled).  The buffer never
 * grows beyond max_line + FRAME_READ_CHUNK + 2 bytes, nor beyond what the
 * budget allows: *room is 0 when it is full and the budget refuses more (the
 * next frame_next then says FRAME_OVER_BUDGET unless a whole line is in it).
 */
void frame_space(frame_t *f, char **buf, size_t *room);
/* n bytes were read into the space frame_space gave. */
void frame_filled(frame_t *f, size_t n);
/*
 * Copies up to n bytes of data (borrowed) into the input as one read would;
 * returns how many it took (fewer when the buffer is full).  For callers
 * without a read loop (tests, the fuzz target).
 */
size_t frame_feed(frame_t *f, const void *data, size_t n);
/*
 * Returns the next event in *ev (its pointers borrowed until the next call
 * to any frame function).  eof says no byte will ever follow what was fed:
 * a last line without "\n" is then a line, a short bulk payload TRUNCATED.
 */
enum frame_kind frame_next(frame_t *f, int eof, frame_ev_t *ev);
/* The LINE, BLANK or BULK event frame_next returned last has been handled. */
void frame_consume(frame_t *f);
/*
 * The line being handled (a bulk header) is followed by a payload of nbytes:
 * after frame_consume, the framer collects it and returns FRAME_BULK.  The
 * caller has checked nbytes against its limits.  Returns 0, or -1 when the
 * budget cannot reserve the payload (nothing changed: refuse the request and
 * call frame_skip_bulk).
 */
int frame_expect_bulk(frame_t *f, size_t nbytes);
/*
 * The line being handled (a bulk header) is followed by a payload of nbytes
 * that was refused: after frame_consume, those bytes are dropped as they
 * arrive, unbuffered, and framing goes on with the lines after them.
 */
void frame_skip_bulk(frame_t *f, size_t nbytes);

/* Query */

/* Returns 1 when the framer is inside a bulk payload (announced and not yet consumed). */
int frame_in_bulk(const frame_t *f);

#endif /* WORTH_FRAME_H */
