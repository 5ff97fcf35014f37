/*
 * worth/export.h - WORTH_API, the mark of a function libworth-client exports.
 *
 * The library is built with -fvisibility=hidden: only what is marked
 * WORTH_API (the documented worth_* functions) enters its dynamic symbol
 * table, so its internals (the JSON writer, the allocator) can neither clash
 * with a program's own names nor become an interface by accident.
 * tests/client/install_check.sh fails on any other exported symbol.
 */
#ifndef WORTH_EXPORT_H
#define WORTH_EXPORT_H

#if defined(__GNUC__) || defined(__clang__)
#define WORTH_API __attribute__((visibility("default")))
#else
#define WORTH_API
#endif

#endif /* WORTH_EXPORT_H */
