/*
 * worth/protocol.h - the constants of worthd's wire protocol (schema/protocol.md).
 *
 * A client and worthd talk only when they speak the same protocol version:
 * worthd says its own in the reply to hello ("protocol"), and worth_connect
 * refuses a daemon of another version (WORTH_E_UNSUPPORTED).
 */
#ifndef WORTH_PROTOCOL_H
#define WORTH_PROTOCOL_H

/* The protocol version of this header and of the library built with it. */
#define WORTH_PROTOCOL_VERSION 1

#endif /* WORTH_PROTOCOL_H */
