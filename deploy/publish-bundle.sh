#!/bin/sh
# Publish a bundle to the store and make it the active version: the one-shot job of
# deploy/compose.yaml and deploy/kubernetes/publish-job.yaml (tools image).
#
#   RBFGATE_STORE            the store directory (the shared volume)             required
#   RBFGATE_BUNDLE           bundle directory or single-file .tar to publish;
#                            "demo" (the default) builds the quick-start demo bundle
#   RBFGATE_ACTIVATE_REASON  the reason written into the store's history         required
#   RBFGATE_ACTOR            who is recorded as publishing and activating        (default: publish-job)
#
# Safe to run again: a bundle already published with the same digest is left as it is,
# and a version that is already active is not activated a second time. Every replica
# follows the store's active pointer within its poll interval; nothing is restarted.
set -eu

: "${RBFGATE_STORE:?set RBFGATE_STORE to the store directory}"
: "${RBFGATE_ACTIVATE_REASON:?set RBFGATE_ACTIVATE_REASON to the reason recorded in the history}"
bundle="${RBFGATE_BUNDLE:-demo}"
actor="${RBFGATE_ACTOR:-publish-job}"
export RBFGATE_STORE

work="$(mktemp -d)"
trap 'rm -rf "$work"' EXIT

if [ "$bundle" = demo ]; then
    # The demo retrains on every run (a new digest each time), so it is built only
    # while the store does not hold it yet.
    name=pallet-checks
    version=1.0.0
    if rbfgate versions "$name" 2>/dev/null | awk '{print $1}' | grep -qx "$version"; then
        echo "publish-bundle: $name $version is already in $RBFGATE_STORE"
    else
        rbfgate demo --out "$work/demo"
        rbfgate publish "$work/demo/bundles/$name-$version" --actor "$actor"
    fi
else
    rbfgate verify "$bundle"
    rbfgate inspect "$bundle" --json > "$work/inspect.json"
    name="$(python3 -c 'import json, sys; print(json.load(open(sys.argv[1]))["name"])' "$work/inspect.json")"
    version="$(python3 -c 'import json, sys; print(json.load(open(sys.argv[1]))["version"])' "$work/inspect.json")"
    rbfgate publish "$bundle" --actor "$actor"
fi

active="$(rbfgate versions "$name" | awk '$NF == "active" {print $1}')"
if [ "$active" = "$version" ]; then
    echo "publish-bundle: $name $version is already the active version; nothing to activate"
else
    rbfgate activate "$name" "$version" --reason "$RBFGATE_ACTIVATE_REASON" --actor "$actor"
fi
