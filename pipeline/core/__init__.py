"""The machinery every layer may use: errors, configuration, schemas and manifests, files,
caches, locks, parallel maps, code versions and the runner. Imports nothing above it."""
