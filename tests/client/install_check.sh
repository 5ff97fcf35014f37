#!/bin/sh
# install_check.sh BUILD_DIR: installs worth into a temporary DESTDIR, then
# 1. checks that the installed libworth-client.so exports the worth_* functions
#    and nothing else (nm -D --defined-only; the library is built with hidden
#    visibility and marks its API with WORTH_API), and
# 2. builds a program against the installed library and headers with nothing but
#    pkg-config's flags for worth-client, and runs it (tests only).
set -eu
build=$1
dest=$(mktemp -d)
trap 'rm -rf "$dest"' EXIT
DESTDIR="$dest" meson install -C "$build" --no-rebuild --quiet >/dev/null
pc=$(dirname "$(find "$dest" -name worth-client.pc | head -n 1)")
[ -n "$pc" ] || { echo "worth-client.pc not installed"; exit 1; }
lib=$(dirname "$(find "$dest" -name 'libworth-client.so' | head -n 1)")

# The dynamic symbols the library defines.  A sanitizer build adds its own
# instrumentation symbols (__asan_*, __odr_asan.*, __ubsan_*, __sancov_*): those
# are the compiler's, not the library's interface, and are left out.
nm -D --defined-only "$lib/libworth-client.so" | awk 'NF >= 3 { print $3 }' |
    grep -Ev '^(__asan_|__odr_asan|___asan_|__ubsan_|__sancov_)' | sort >"$dest/symbols"
grep -q '^worth_connect$' "$dest/symbols" || { echo "worth_connect is not exported"; exit 1; }
if grep -v '^worth_' "$dest/symbols" >"$dest/extra"; then
    echo "libworth-client.so exports symbols outside the worth_* API:"
    cat "$dest/extra"
    exit 1
fi

cat > "$dest/prog.c" <<'C'
#include <stdio.h>
#include <string.h>
#include <worth/client.h>
#include <worth/protocol.h>
int main(void)
{
    if (strcmp(worth_version(), WORTH_VERSION_WANTED) != 0) {
        printf("worth_version() is %s, want %s\n", worth_version(), WORTH_VERSION_WANTED);
        return 1;
    }
    if (WORTH_PROTOCOL_VERSION != 1) {
        printf("WORTH_PROTOCOL_VERSION is %d\n", WORTH_PROTOCOL_VERSION);
        return 1;
    }
    worth_opts o = {.socket_path = "/nonexistent/worthd.sock"};
    worth_client *c = NULL;
    char err[256];
    int rc = worth_connect(&o, &c, err, sizeof err);
    printf("%s: %s\n", worth_err_name(rc), err);
    return rc == WORTH_E_IO ? 0 : 1;
}
C
version=$(meson introspect --projectinfo "$build" | /usr/bin/python3 -c 'import json,sys; print(json.load(sys.stdin)["version"])')
flags=$(PKG_CONFIG_PATH="$pc" PKG_CONFIG_SYSROOT_DIR="$dest" pkg-config --cflags --libs worth-client)
# A sanitizer build of the library needs the sanitizer runtimes in the program too.
san=""
if nm -D "$lib/libworth-client.so" | grep -q __asan_; then
    san="-fsanitize=address,undefined"
fi
# shellcheck disable=SC2086
cc -std=c11 -Wall -Wextra -Werror $san -DWORTH_VERSION_WANTED="\"$version\"" -o "$dest/prog" \
    "$dest/prog.c" $flags
LD_LIBRARY_PATH="$lib" "$dest/prog"
echo "$(wc -l <"$dest/symbols") symbols exported, all worth_*"
echo "1 passed, 0 failed"
