#!/bin/sh
# Installs Debian's chromium and chromium-driver for the console's browser test
# (tests/ui) when /usr/bin/chromium or /usr/bin/chromedriver is missing. Idempotent.
# Never fails the run: when apt cannot be used (not root, no apt, the lock held past
# the bounded wait, no network) it says so and the browser test is skipped instead.
set -u
if [ -x /usr/bin/chromium ] && [ -x /usr/bin/chromedriver ]; then
    exit 0
fi
if [ "$(id -u)" != 0 ] || ! command -v apt-get >/dev/null 2>&1; then
    echo "browser.sh: chromium missing and apt-get is not usable here; the browser test will be skipped" >&2
    exit 0
fi
export DEBIAN_FRONTEND=noninteractive
# the dpkg lock may be held by another apt run: apt waits up to 120 s for it, and the
# whole step is tried 3 times (common practice, no source)
for attempt in 1 2 3; do
    if apt-get -o DPkg::Lock::Timeout=120 update -qq >/dev/null &&
       apt-get -o DPkg::Lock::Timeout=120 install -y -qq --no-install-recommends \
           chromium chromium-driver >/dev/null; then
        exit 0
    fi
    echo "browser.sh: apt-get attempt $attempt failed" >&2
    [ "$attempt" = 3 ] || sleep 10
done
echo "browser.sh: could not install chromium; the browser test will be skipped" >&2
exit 0
