# Shared by the browser scripts (sourced, not run): Debian's chromium when
# missing, the debug binary, and the artifacts folder. Expects ROOT and a
# fail() function; sets BIN and ART.
if ! command -v chromium >/dev/null 2>&1; then
  SUDO=""
  if [ "$(id -u)" != 0 ] && command -v sudo >/dev/null 2>&1; then SUDO=sudo; fi
  $SUDO apt-get update -qq
  DEBIAN_FRONTEND=noninteractive $SUDO apt-get install -y -qq chromium >/dev/null
fi

cargo build --quiet --locked --bin slopewarden
BIN="${CARGO_TARGET_DIR:-$ROOT/target}/debug/slopewarden"
[ -x "$BIN" ] || fail "no binary at $BIN"
ART="${CARGO_TARGET_DIR:-$ROOT/target}/test-artifacts"
mkdir -p "$ART"
