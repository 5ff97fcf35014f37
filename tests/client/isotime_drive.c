/*
 * isotime_drive.c - client/cli/isotime on standard input, for
 * test_isotime_python.py: each line is a time string; each answer is one
 * line, "OK <seconds since 1970 as %.17g>" or "ERR <message>".
 */
#include <stdio.h>
#include <string.h>

#include "isotime.h"

int main(void)
{
    char line[512], err[256];
    while (fgets(line, sizeof line, stdin)) {
        line[strcspn(line, "\n")] = 0;
        double t;
        if (isotime_parse(line, &t, err, sizeof err) == 0)
            printf("OK %.17g\n", t);
        else
            printf("ERR %s\n", err);
    }
    return 0;
}
