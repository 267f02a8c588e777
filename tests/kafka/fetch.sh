#!/usr/bin/env bash
# Fetch the jars of the test Kafka broker (tests/kafka/pom.xml) from Maven
# Central into .cache/kafka/lib, unless a complete copy for this exact pom is
# already there. Idempotent; fails loudly (non-zero exit, message on stderr).
#
# "Complete" means: .cache/kafka/lib/MANIFEST exists, was written for a pom
# with the same sha256 as now, and every jar it lists is present with the
# size it lists. Anything else is fetched anew into a temporary folder that
# replaces lib only once Maven has succeeded, so an interrupted fetch never
# leaves a half-filled lib behind that looks complete.
set -euo pipefail

here="$(cd "$(dirname "$0")" && pwd)"
root="$(cd "$here/../.." && pwd)"
pom="$here/pom.xml"
cache="$root/.cache/kafka"
lib="$cache/lib"
manifest="$lib/MANIFEST"

die() { echo "tests/kafka/fetch.sh: $*" >&2; exit 1; }

command -v mvn >/dev/null || die "mvn (Apache Maven) is not installed; it is needed to fetch the Kafka broker jars"
command -v java >/dev/null || die "java is not installed; the Kafka test broker needs a JDK (17 or newer)"
command -v sha256sum >/dev/null || die "sha256sum is not installed"

pom_sum="$(sha256sum "$pom" | cut -d' ' -f1)"

complete() {
    [ -f "$manifest" ] || return 1
    [ "$(head -n1 "$manifest")" = "pom-sha256 $pom_sum" ] || return 1
    local name size n=0
    while read -r name size; do
        [ -f "$lib/$name" ] || return 1
        [ "$(stat -c %s "$lib/$name")" = "$size" ] || return 1
        n=$((n + 1))
    done < <(tail -n +2 "$manifest")
    [ "$n" -gt 0 ]
}

if complete; then
    echo "Kafka broker jars: complete in $lib ($(($(wc -l < "$manifest") - 1)) jars)"
    exit 0
fi

mkdir -p "$cache"
tmp="$(mktemp -d "$cache/lib.tmp.XXXXXX")"
trap 'rm -rf "$tmp"' EXIT

echo "Kafka broker jars: fetching into $lib"
start=$SECONDS
# Debian's Maven 3.8.7 prints bare colour resets even with -B -q: strip them
# (pipefail keeps Maven's exit status).
(cd "$here" && mvn -B -q \
    org.apache.maven.plugins:maven-dependency-plugin:3.6.1:copy-dependencies \
    -DincludeScope=runtime -DoutputDirectory="$tmp") 2>&1 | sed 's/\x1b\[[0-9;]*m//g' \
    || die "Maven could not fetch the Kafka broker jars (see its output above)"

# The jars the broker cannot start without: fail here, not at broker start.
kafka_version="$(sed -n 's:.*<kafka.version>\(.*\)</kafka.version>.*:\1:p' "$pom")"
log4j_version="$(sed -n 's:.*<log4j.version>\(.*\)</log4j.version>.*:\1:p' "$pom")"
for jar in "kafka_2.13-$kafka_version.jar" "kafka-server-$kafka_version.jar" \
           "kafka-clients-$kafka_version.jar" "log4j-core-$log4j_version.jar" \
           "log4j-slf4j-impl-$log4j_version.jar"; do
    [ -s "$tmp/$jar" ] || die "Maven finished but $jar is missing from the fetched jars"
done

{
    echo "pom-sha256 $pom_sum"
    for f in "$tmp"/*.jar; do
        echo "$(basename "$f") $(stat -c %s "$f")"
    done
} > "$tmp/MANIFEST"

rm -rf "$lib"
mv "$tmp" "$lib"
trap - EXIT
echo "Kafka broker jars: $(($(wc -l < "$manifest") - 1)) jars, $(du -sh "$lib" | cut -f1), in $((SECONDS - start)) s"
