// Package deploy holds no code. Its tests check the operator artefacts kept
// beside it: the systemd unit, the container build, the Kubernetes
// manifests, the Prometheus alerting rules and the Grafana dashboard. They
// parse every file, cross-check names (metric names, ports, probe paths,
// Secret keys) against each other and against the daemon's contracts, and
// run promtool when it happens to be installed.
package deploy
