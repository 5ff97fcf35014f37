/* natsurls.c - see natsurls.h. */
#include "common/natsurls.h"

#include <stdlib.h>
#include <string.h>

#define NATSURLS_MAX 32

natsStatus natsurls_set(natsOptions *o, const char *urls)
{
    char *copy = strdup(urls ? urls : "");
    if (!copy)
        return NATS_NO_MEMORY;
    const char *list[NATSURLS_MAX];
    int n = 0;
    natsStatus st = NATS_OK;
    for (char *save = NULL, *t = strtok_r(copy, ",", &save); t; t = strtok_r(NULL, ",", &save)) {
        while (*t == ' ')
            t++;
        for (size_t len = strlen(t); len && t[len - 1] == ' ';)
            t[--len] = 0;
        if (!*t)
            continue;
        if (n == NATSURLS_MAX) {
            st = NATS_INVALID_ARG;
            break;
        }
        list[n++] = t;
    }
    if (st == NATS_OK)
        st = n ? natsOptions_SetServers(o, list, n) : NATS_INVALID_ARG;
    free(copy);
    return st;
}
