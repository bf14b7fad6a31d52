#!/usr/bin/env bash
# Installs the Debian packages that tests and the plugin build need.
# lilv-utils: lv2ls, lv2info, lv2apply (the reference LV2 host tools)
# lv2-dev: LV2 headers and lv2_validate; sordi: RDF parser lv2_validate calls
# binutils: readelf and nm, which the plugin tests use to check the shared object
# chromium: headless browser that renders the HTML reports in the tests (about 10 s to install
#   here; if it cannot be had, those two checks are skipped and the rest still runs)
# Optional LV2 test hosts (the plugin is run in them; their tests skip, saying so, without them):
#   ecasound: a command-line host that starts every control port at 0
#   gstreamer1.0-tools (gst-launch-1.0, gst-inspect-1.0), gstreamer1.0-plugins-bad (its lv2
#   element bridge), gstreamer1.0-plugins-base (audioconvert) and -good (wavparse, wavenc)
#   lv2file: another lilv-based command-line host
set -euo pipefail
needed=(lilv-utils lv2-dev sordi binutils)
optional=(chromium ecasound lv2file gstreamer1.0-tools gstreamer1.0-plugins-base
          gstreamer1.0-plugins-good gstreamer1.0-plugins-bad)
# The plugin shim is C compiled against the Python that runs the venv: it needs a compiler and
# that Python's headers and shared library (Debian's python3-dev when the venv comes from
# Debian's python3; interpreters built elsewhere, e.g. with pyenv, ship their own).
command -v cc >/dev/null 2>&1 || needed+=(build-essential)
py=${PYTHON:-python3}
if ! "$py" -c 'import os, sysconfig; raise SystemExit(not os.path.exists(os.path.join(sysconfig.get_paths()["include"], "Python.h")))' 2>/dev/null; then
  needed+=(python3-dev)
fi
absent() {
  local out=()
  for pkg in "$@"; do
    dpkg-query -W -f='${Status}' "$pkg" 2>/dev/null | grep -q "install ok installed" || out+=("$pkg")
  done
  echo "${out[@]:-}"
}
read -r -a missing <<< "$(absent "${needed[@]}")"
read -r -a missing_optional <<< "$(absent "${optional[@]}")"
[ ${#missing[@]} -eq 0 ] && [ ${#missing_optional[@]} -eq 0 ] && exit 0
if [ "$(id -u)" -eq 0 ]; then
  apt=(apt-get)
elif command -v sudo >/dev/null 2>&1 && sudo -n true 2>/dev/null; then
  apt=(sudo apt-get)
else
  echo "Missing Debian packages: ${missing[*]} ${missing_optional[*]} (install them with"
  echo "apt-get as root); the LV2 plugin, host and browser tests are skipped until they are"
  echo "present."
  exit 0
fi
export DEBIAN_FRONTEND=noninteractive
"${apt[@]}" update -qq
if [ ${#missing[@]} -gt 0 ]; then
  echo "Installing Debian packages: ${missing[*]}"
  "${apt[@]}" install -y -qq --no-install-recommends "${missing[@]}" >/dev/null
fi
if [ ${#missing_optional[@]} -gt 0 ]; then
  echo "Installing optional Debian packages: ${missing_optional[*]}"
  # All at once (one dependency solve); if that fails, one by one, so one package that this
  # Debian lacks does not cost the others.
  if ! "${apt[@]}" install -y -qq --no-install-recommends "${missing_optional[@]}" >/dev/null; then
    for pkg in "${missing_optional[@]}"; do
      "${apt[@]}" install -y -qq --no-install-recommends "$pkg" >/dev/null \
        || echo "Could not install $pkg: the checks that need it (browser, LV2 hosts) are skipped."
    done
  fi
fi
