/*
 * say.h - worthd's event log: one line per event on stderr, with a level.
 *
 *   2026-12-01T22:59:31.123Z info  listening on ./worthd.sock (unix, mode 0660)
 *
 * Safe from any thread (one fprintf per line, stderr unbuffered).  Never pass
 * a token or other secret to these functions.
 */
#ifndef WORTH_SAY_H
#define WORTH_SAY_H

enum say_level { SAY_ERROR, SAY_WARN, SAY_INFO, SAY_DEBUG };

/* Sets the most verbose level printed (SAY_INFO by default); any thread. */
void say_set_level(enum say_level level);
/* Returns the level named name ("error", "warn", "info", "debug"), or -1. */
int say_parse_level(const char *name);
/*
 * Returns 1, and from then on starts each line with its syslog priority ("<3>")
 * instead of the time, when $JOURNAL_STREAM names stderr (it is the journal);
 * else 0.  Once, at start-up, before threads exist.
 */
int say_detect_journal(void);
/* Returns 1 when level would be printed. */
int say_enabled(enum say_level level);

void say(enum say_level level, const char *fmt, ...) __attribute__((format(printf, 2, 3)));

#define say_error(...) say(SAY_ERROR, __VA_ARGS__)
#define say_warn(...)  say(SAY_WARN, __VA_ARGS__)
#define say_info(...)  say(SAY_INFO, __VA_ARGS__)
#define say_debug(...) say(SAY_DEBUG, __VA_ARGS__)

#endif /* WORTH_SAY_H */
