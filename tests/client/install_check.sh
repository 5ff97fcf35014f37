#!/bin/sh
# install_check.sh BUILD_DIR: installs worth into a temporary DESTDIR, then builds a
# program against the installed library with nothing but pkg-config's flags for
# worth-client, and runs it (tests only).
set -eu
build=$1
dest=$(mktemp -d)
trap 'rm -rf "$dest"' EXIT
DESTDIR="$dest" meson install -C "$build" --no-rebuild --quiet >/dev/null
pc=$(dirname "$(find "$dest" -name worth-client.pc | head -n 1)")
[ -n "$pc" ] || { echo "worth-client.pc not installed"; exit 1; }
cat > "$dest/prog.c" <<'C'
#include <stdio.h>
#include <worth/client.h>
int main(void)
{
    worth_opts o = {.socket_path = "/nonexistent/worthd.sock"};
    worth_client *c = NULL;
    char err[256];
    int rc = worth_connect(&o, &c, err, sizeof err);
    printf("%s: %s\n", worth_err_name(rc), err);
    return rc == WORTH_E_IO ? 0 : 1;
}
C
flags=$(PKG_CONFIG_PATH="$pc" PKG_CONFIG_SYSROOT_DIR="$dest" pkg-config --cflags --libs worth-client)
lib=$(dirname "$(find "$dest" -name 'libworth-client.so' | head -n 1)")
# A sanitizer build of the library needs the sanitizer runtimes in the program too.
san=""
if nm -D "$lib/libworth-client.so" | grep -q __asan_; then
    san="-fsanitize=address,undefined"
fi
# shellcheck disable=SC2086
cc -std=c11 -Wall -Wextra -Werror $san -o "$dest/prog" "$dest/prog.c" $flags
LD_LIBRARY_PATH="$lib" "$dest/prog"
echo "1 passed, 0 failed"
