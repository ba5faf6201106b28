#!/usr/bin/env bash
# Set up spark_align on this machine: a Java 17 runtime for Spark (if missing) and the package.
#   bash scripts/setup.sh          the package and its runtime dependencies
#   bash scripts/setup.sh --test   also what the tests need (pytest, nltk; Chromium for the report test)
set -euo pipefail
cd "$(dirname "$0")/.."

java_ok() {
  command -v java >/dev/null 2>&1 && java -version 2>&1 | grep -Eq 'version "(17|21)'
}
apt_install() {
  if [ "$(id -u)" = 0 ]; then apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq "$@"
  else sudo apt-get update -qq && sudo DEBIAN_FRONTEND=noninteractive apt-get install -y -qq "$@"; fi
}

if ! java_ok; then
  echo "setup: installing a Java 17 runtime for Spark (openjdk-17-jre-headless)"
  apt_install openjdk-17-jre-headless
fi

extras=""
if [ "${1:-}" = "--test" ]; then
  extras="[test,report]"
  if ! command -v chromium >/dev/null 2>&1; then
    echo "setup: installing Chromium for the report screenshot test (optional)"
    apt_install chromium >/dev/null 2>&1 || echo "setup: Chromium not installed; the screenshot test will be skipped"
  fi
fi
PIP_ROOT_USER_ACTION=ignore python3 -m pip install -q --disable-pip-version-check -e ".${extras}"
echo "setup: done ($(python3 -c 'import spark_align, pyspark; print("spark_align", spark_align.__version__, "/ pyspark", pyspark.__version__)'))"
