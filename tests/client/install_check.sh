#!/bin/sh
# install_check.sh BUILD_DIR: installs worth into a temporary DESTDIR, then
# 1. checks that the installed libworth-client.so exports the worth_* functions
#    and nothing else (nm -D --defined-only; the library is built with hidden
#    visibility and marks its API with WORTH_API),
# 2. builds a program against the installed library and headers with nothing but
#    pkg-config's flags for worth-client, and runs it (tests only), and
# 3. checks the rest of the install: worthd in sbindir, the systemd unit with the
#    configured paths (verified by systemd-analyze verify, its ExecStart pointed at
#    the binary in the temporary root), the sysusers.d file, the man pages, the bash
#    completion (bash -n, and it completes the commands), the protocol, and the
#    sample config, which worthd --check-config accepts.
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

prefix=$(meson introspect --buildoptions "$build" | /usr/bin/python3 -c 'import json,sys; print({o["name"]: o["value"] for o in json.load(sys.stdin)}["prefix"])')
root="$dest$prefix"
fail() { echo "install: $*"; exit 1; }
[ -x "$root/sbin/worthd" ] || fail "worthd is not in sbindir ($prefix/sbin)"
[ -x "$root/bin/worth" ] || fail "worth is not in bindir"
unit="$root/lib/systemd/system/worthd.service"
[ -f "$unit" ] || fail "no systemd unit at $unit"
grep -qx "ExecStart=$prefix/sbin/worthd" "$unit" || fail "the unit's ExecStart is not $prefix/sbin/worthd"
grep -qx "Type=notify" "$unit" || fail "the unit is not Type=notify"
sed "s|^ExecStart=$prefix/sbin/worthd|ExecStart=$root/sbin/worthd|" "$unit" >"$dest/worthd.service"
out=$(systemd-analyze verify --man=no --generators=no "$dest/worthd.service" 2>&1) ||
    fail "systemd-analyze verify: $out"
[ -z "$out" ] || fail "systemd-analyze verify: $out"
echo "systemd-analyze verify: the unit has no finding"
grep -q '^u worthd ' "$root/lib/sysusers.d/worthd.conf" || fail "no worthd user in sysusers.d"
for m in man8/worthd.8 man1/worth.1; do
    f="$root/share/man/$m"
    [ -s "$f" ] || fail "no man page $m"
    head -n 1 "$f" | grep -q '^\.TH ' || fail "$m does not start with .TH"
done
grep -q 'max\\-query\\-work' "$root/share/man/man8/worthd.8" || fail "worthd.8 lacks the options"
grep -q '^\.SS rollback' "$root/share/man/man1/worth.1" || fail "worth.1 lacks the commands"
comp="$root/share/bash-completion/completions/worth"
bash -n "$comp" || fail "the bash completion does not parse"
got=$(bash -c '. "$1"; COMP_WORDS=(worth ro); COMP_CWORD=1; _worth; echo "${COMPREPLY[*]}"' _ "$comp")
[ "$got" = "rollback" ] || fail "completing 'worth ro' gave '$got', not rollback"
got=$(bash -c '. "$1"; COMP_WORDS=(worth drop --p); COMP_CWORD=2; _worth; echo "${COMPREPLY[*]}"' _ "$comp")
[ "$got" = "--purge" ] || fail "completing 'worth drop --p' gave '$got', not --purge"
[ -s "$root/share/doc/worth/protocol.md" ] || fail "the protocol is not installed"
[ -s "$root/share/doc/worth/fleet.md" ] || fail "the fleet mode's design is not installed"
conf="$root/etc/worthd/worthd.conf"
[ -s "$conf" ] || fail "no sample config"
"$root/sbin/worthd" --config "$conf" --check-config >/dev/null || fail "worthd --check-config refuses the sample config"
echo "1 passed, 0 failed"
