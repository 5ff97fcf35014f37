#!/usr/bin/python3
"""Writes worthd.8 from its template, with the OPTIONS section from worthd's own option table.

Usage: manpage.py WORTHD TEMPLATE OUT VERSION SYSCONFDIR DOCDIR
Runs `WORTHD --print-man-options` (the one table in daemon/options.c) and puts its output
where the template says @OPTIONS@.
"""
import subprocess
import sys


def main():
    worthd, template, out, version, sysconfdir, docdir = sys.argv[1:7]
    opts = subprocess.run([worthd, "--print-man-options"], check=True, capture_output=True,
                          text=True, env={"PATH": "/usr/bin:/bin"}).stdout
    with open(template, encoding="utf-8") as f:
        text = f.read()
    for key, val in (("@OPTIONS@", opts.rstrip("\n")), ("@VERSION@", version),
                     ("@SYSCONFDIR@", sysconfdir), ("@DOCDIR@", docdir)):
        text = text.replace(key, val)
    with open(out, "w", encoding="utf-8") as f:
        f.write(text)


if __name__ == "__main__":
    main()
