/*
 * list.h - the one intrusive doubly linked list: any struct with `prev` and
 * `next` pointers of its own type, and a head pointer to the first.
 *
 * Macros, so the list needs no casts nor a node type of its own; each
 * evaluates head and node more than once (pass plain lvalues).
 */
#ifndef WORTH_LIST_H
#define WORTH_LIST_H

/* Puts node first in the list at head. */
#define LIST_PUSH(head, node)                                                                      \
    do {                                                                                           \
        (node)->prev = NULL;                                                                       \
        (node)->next = (head);                                                                     \
        if (head)                                                                                  \
            (head)->prev = (node);                                                                 \
        (head) = (node);                                                                           \
    } while (0)

/* Takes node out of the list at head (its own pointers are left as they were). */
#define LIST_UNLINK(head, node)                                                                    \
    do {                                                                                           \
        if ((node)->prev)                                                                          \
            (node)->prev->next = (node)->next;                                                     \
        else                                                                                       \
            (head) = (node)->next;                                                                 \
        if ((node)->next)                                                                          \
            (node)->next->prev = (node)->prev;                                                     \
    } while (0)

#endif /* WORTH_LIST_H */
